"""`featpipe suggest`: candidate terms ranked by score tests computed in the engine.

References outside the project: statsmodels' GLMResults.score_test (Rao's score test at the restricted
fit) on the same training rows read back from DuckDB, a learned term's columns computed by numpy from the
fitted file's constants (the restricted cubic spline from Harrell's formula); statsmodels' multipletests for Holm's
adjustment; scikit-learn's roc_auc_score for the true model's holdout AUC on invented data whose log-odds
we wrote; PostgreSQL and Spark for the same statistics as DuckDB.
"""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import copy_demo, run_featpipe, write_project
from recording import Recording
from spline_reference import restricted_cubic_spline
from statsmodels.stats.multitest import multipletests
from test_learned_terms import lease_project

from featpipe import api
from featpipe.compiler.candidates import ColumnSummary, ModelTermInfo, generate_candidates
from featpipe.engines.compute import build_designs
from featpipe.fitted import read_fitted
from featpipe.fitting.suggest import CAUTION
from featpipe.fitting.suggest import suggest as suggest_in
from featpipe.glm.score_test import holm
from featpipe.project import load_project
from featpipe.project.names import HOLDOUT_COLUMN, OFFSET_COLUMN

GAUSSIAN_SPEC = """\
input: leases
target: monthly_payment
family: gaussian
terms: [term_months, firm_age_years, past_late_payments]
"""


def _lease_project(tmp_path: Path) -> Path:
    root = copy_demo("lease_default", tmp_path)
    (root / "specs" / "payment_size.yaml").write_text(GAUSSIAN_SPEC, encoding="utf-8")
    return root


def _training_frame(root: Path, model: str, key: str, input_name: str, candidates: dict[str, str]) -> pd.DataFrame:
    """The model's training rows from its design table, with each candidate computed by DuckDB from its SQL."""
    project = load_project(root)
    layout = api.check(project).models[model].layout
    with duckdb.connect(str(project.engine.path), read_only=True) as connection:
        design = connection.execute(f'SELECT * FROM "{layout.table}" WHERE NOT "{HOLDOUT_COLUMN}"').df()
        values = ", ".join(f"{sql} AS \"{name}\"" for name, sql in candidates.items())
        columns = set(project.inputs[input_name].columns)
        # an interaction names a model term; terms that are input columns are read from the input
        terms = ", ".join([f'"{key}" AS _design_key', *(f'"{term}"' for term in layout.terms if term not in columns)])
        extra = connection.execute(f'SELECT "{input_name}"."{key}" AS _key, {values} FROM "{input_name}" '
                                   f'JOIN (SELECT {terms} FROM "{layout.table}") '
                                   f'ON "{input_name}"."{key}" = _design_key').df()
    design = design.dropna(subset=list(layout.model_columns))
    return design.merge(extra, left_on=key, right_on="_key", how="left")


@pytest.fixture(scope="module")
def fitted_demos(tmp_path_factory) -> dict[str, Path]:
    """Both demo projects as they are, their main models with a learned term (default_risk's LEVELS
    sector_level, claim_frequency's SPLINE vehicle_age_curve) and the gaussian payment_size fitted."""
    folder = tmp_path_factory.mktemp("demos")
    roots = {"lease_default": _lease_project(folder), "fleet_claims": copy_demo("fleet_claims", folder)}
    api.fit(load_project(roots["lease_default"]), ["default_risk", "payment_size"])
    api.fit(load_project(roots["fleet_claims"]), ["claim_frequency"])
    return roots


def _model_design(frame: pd.DataFrame, fitted) -> np.ndarray:
    """The fitted model's design matrix computed by numpy from its training rows (the design table holds a
    learned term's argument): an intercept, each term's own column, and from the constants in the fitted
    file a LEVELS term's indicators (its level's, or `other` for a pooled level), a SPLINE term's basis
    (tests/spline_reference.py), a BINS term's bin indicators and a CAPPED term's clipped value."""
    columns = []
    for term in fitted.model_terms:
        learned, value = term.learned, frame[term.name]
        if learned is None:
            columns.append(value.to_numpy(float))
        elif learned["function"] == "LEVELS":
            columns += [(value.isin(learned["pooled"]) if item["label"] == "other" else value == item["label"]).to_numpy(float)
                        for item in learned["columns"]]
        elif learned["function"] == "SPLINE":
            columns += restricted_cubic_spline(value.to_numpy(float), learned["values"])
        elif learned["function"] == "BINS":  # bin i holds edges[i-1] < v <= edges[i]; bin 0 is the reference
            bins = np.searchsorted(learned["values"], value.to_numpy(float), side="left")
            columns += [(bins == i).astype(float) for i in range(1, len(learned["values"]) + 1)]
        else:
            columns.append(np.clip(value.to_numpy(float), *learned["values"]))
    return sm.add_constant(np.column_stack(columns), has_constant="add")


@pytest.mark.parametrize(
    ("demo", "model", "key", "input_name", "family", "columns"),
    [
        ("lease_default", "default_risk", "lease_id", "leases", sm.families.Binomial(), 8 + 5),
        ("fleet_claims", "claim_frequency", "vehicle_year_id", "vehicle_years", sm.families.Poisson(), 5 + 3),
        ("lease_default", "payment_size", "lease_id", "leases", sm.families.Gaussian(), 3),
    ],
    ids=["binomial with LEVELS", "poisson with offset and SPLINE", "gaussian"],
)
def test_score_statistics_equal_statsmodels_score_test(fitted_demos, demo, model, key, input_name, family, columns):
    _check_against_statsmodels(fitted_demos[demo], model, key, input_name, family, columns)


def test_score_statistics_with_pooled_levels_bins_and_caps_equal_statsmodels_score_test(tmp_path):
    root, _ = lease_project(tmp_path, "SELECT LEVELS(sector, 40) AS sector_level, BINS(income, 4) AS income_band,\n"
                                      "  CAPPED(income, 0.05, 0.95) AS capped_income FROM leases\n",
                            ["sector_level", "income_band", "capped_income"])
    api.fit(load_project(root), ["risk"])
    labels = [item["label"] for item in read_fitted(load_project(root).fitted_path("risk")).term("sector_level").learned["columns"]]
    assert labels[-1] == "other"  # mining and fishing pooled (tests/test_learned_terms.py)
    # four sector columns (other included), three bins above the first, one capped income
    _check_against_statsmodels(root, "risk", "lease_id", "leases", sm.families.Binomial(), 4 + 3 + 1)


def _check_against_statsmodels(root: Path, model: str, key: str, input_name: str, family, columns: int) -> None:
    project = load_project(root)
    report = api.suggest(project, model, top=10)
    chosen = [s for s in report.suggestions if s.null_share == 0][:12]
    assert len(chosen) == 12
    frame = _training_frame(root, model, key, input_name, {s.name: s.sql for s in chosen})
    assert len(frame) == report.training_rows
    layout = api.check(project).models[model].layout
    X = _model_design(frame, read_fitted(project.fitted_path(model)))
    assert X.shape == (len(frame), 1 + columns)  # the model's terms, a learned one expanded into its columns
    offset = frame[OFFSET_COLUMN].to_numpy(float) if layout.offset else None
    restricted = sm.GLM(frame[layout.target].to_numpy(float), X, family=family, offset=offset).fit(tol=1e-13)
    for suggestion in chosen:
        # statsmodels' score test for adding the column to the restricted fit (Rao 1948)
        statistic, p_value = restricted.score_test(exog_extra=frame[[suggestion.name]].to_numpy(float))[:2]
        assert suggestion.statistic == pytest.approx(float(np.squeeze(statistic)), rel=1e-8), suggestion.name
        assert suggestion.p_value == pytest.approx(float(np.squeeze(p_value)), rel=1e-6, abs=1e-300)


def test_candidates_a_learned_term_already_spans_are_dropped_as_collinear(fitted_demos):
    lease = load_project(fitted_demos["lease_default"])
    levels = [item["level"] for item in read_fitted(lease.fitted_path("default_risk")).term("sector_level").learned["levels"]]
    report = api.suggest(lease, "default_risk", top=1000)
    tested = {s.name for s in report.suggestions}
    # every sector's indicator is a column of LEVELS(sector, 100) or its reference (one minus the others)
    assert {f"sector_is_{level}" for level in levels}.isdisjoint(tested) and len(levels) == 6
    assert report.dropped["collinear"] >= len(levels)
    fleet = api.suggest(load_project(fitted_demos["fleet_claims"]), "claim_frequency", top=1000)
    # the vehicle age is the first column of SPLINE(vehicle_age_years, 4); its square is a new shape
    assert "vehicle_age_years" not in {s.name for s in fleet.suggestions}
    assert "vehicle_age_years_squared" in {s.name for s in fleet.suggestions}


def test_a_learned_term_forms_no_interactions_while_other_terms_do():
    age = ColumnSummary("age", rows=4, count=4, mean=2.5, min=1.0, max=4.0, deciles=(1.0, 2.0, 3.0, 4.0))
    terms = [ModelTermInfo("age_curve", boolean=False, learned=True), ModelTermInfo("km", boolean=False, learned=False)]
    found = generate_candidates(terms, [age], {}, taken={"age_curve", "km", "age"})
    # no term may use a learned term, so a product with it would not even compile
    assert [c.sql for c in found if c.kind == "interaction"] == [
        f"km * CASE WHEN age > {q} THEN 1 ELSE 0 END" for q in (1, 2, 3)]


def test_holm_adjustment_equals_statsmodels():
    p = np.array([0.01, 0.04, 0.03, 0.005, 0.2, 0.04, 1e-9])
    # statsmodels.stats.multitest.multipletests(method="holm")
    assert holm(p) == pytest.approx(multipletests(p, method="holm")[1], rel=1e-15)


def _invented_scores(tmp_path: Path, rows: int = 8000) -> tuple[Path, pd.DataFrame]:
    """Invented applications whose true log-odds use a ratio (debt to income) and an interaction that holds
    only above a threshold (utilisation counts only for accounts older than 7 years); neither is a raw input."""
    rng = np.random.default_rng(20240917)
    debt = rng.uniform(0.5, 5.0, rows)
    income = rng.uniform(0.5, 5.0, rows)
    utilisation = rng.normal(0.0, 1.0, rows)
    account_age = rng.uniform(0.0, 10.0, rows)
    log_odds = -2.0 + debt / income + 1.2 * utilisation * (account_age > 7.0)
    defaulted = (rng.random(rows) < 1 / (1 + np.exp(-log_odds))).astype(int)
    frame = pd.DataFrame({"app_id": np.arange(1, rows + 1), "debt": debt.round(4), "income": income.round(4),
                          "utilisation": utilisation.round(4), "account_age": account_age.round(3), "defaulted": defaulted})
    root = tmp_path / "credit"
    write_project(root, {
        "featpipe.yaml": """\
            name: credit
            engine: {kind: duckdb, path: build/credit.duckdb}
            inputs:
              applications:
                key: app_id
                load: data/applications.csv
                columns: {app_id: BIGINT, debt: DOUBLE, income: DOUBLE, utilisation: DOUBLE, account_age: DOUBLE, defaulted: BIGINT}
            """,
        "data/orders.csv": None, "terms/basket.sql": None, "specs/returns.yaml": None,
        "specs/raw.yaml": "input: applications\ntarget: defaulted\nfamily: binomial\nterms: [debt, income, utilisation, account_age]\n",
    })
    (root / "data").mkdir()
    frame.to_csv(root / "data" / "applications.csv", index=False)
    rounded = frame.debt / frame.income
    frame["true_log_odds"] = -2.0 + rounded + 1.2 * frame.utilisation * (frame.account_age > 7.0)
    return root, frame


def test_ratio_ranks_first_and_interaction_in_top_three_and_refit_reaches_true_auc(tmp_path):
    from sklearn.metrics import roc_auc_score

    root, frame = _invented_scores(tmp_path)
    project = load_project(root)
    (raw,) = api.fit(project, ["raw"])
    report = api.suggest(project, "raw", top=3)
    names = [s.name for s in report.shown]
    assert names[0] == "debt_to_income"
    interaction = next(s for s in report.shown if s.kind == "interaction")
    assert interaction.name.startswith("utilisation_when_account_age_above_"), names
    assert 6.5 < float(interaction.sql.split(" > ")[1].split()[0]) < 7.5  # the training decile nearest 7

    result = run_featpipe("suggest", "raw", "-p", str(root), "--top", "3", "--into", "terms/proposed_raw.sql")
    assert result.returncode == 0, result.stderr
    accepted = ["debt_to_income", interaction.name]
    (root / "specs" / "refit.yaml").write_text(
        "input: applications\ntarget: defaulted\nfamily: binomial\n"
        f"terms: [debt, income, utilisation, account_age, {', '.join(accepted)}]\n", encoding="utf-8")
    (refit,) = api.fit(load_project(root), ["refit"])

    with duckdb.connect(str(root / "build" / "credit.duckdb"), read_only=True) as connection:
        held = connection.execute(f'SELECT app_id FROM design_refit WHERE "{HOLDOUT_COLUMN}"').df()
    holdout = frame[frame.app_id.isin(held.app_id)]
    true_auc = roc_auc_score(holdout.defaulted, holdout.true_log_odds)  # scikit-learn, on the log-odds we wrote
    assert raw.fitted.metrics["auc"] < true_auc - 0.02
    assert refit.fitted.metrics["auc"] == pytest.approx(true_auc, abs=0.01)


@pytest.fixture(scope="module")
def leases(tmp_path_factory) -> Path:
    root = _lease_project(tmp_path_factory.mktemp("suggest"))
    api.compute(load_project(root), ["default_raw"])
    return root


def test_json_lists_the_top_candidates_with_counts_and_the_caution(leases):
    result = run_featpipe("suggest", "default_raw", "-p", str(leases), "--top", "4", "--json")
    assert result.returncode == 0, result.stderr
    found = json.loads(result.stdout)
    assert [s["rank"] for s in found["suggestions"]] == [1, 2, 3, 4]
    statistics = [s["statistic"] for s in found["suggestions"]]
    assert statistics == sorted(statistics, reverse=True)
    assert found["tested"] + sum(found["dropped"].values()) == found["considered"] == found["generated"]
    assert found["caution"] == CAUTION
    assert found["scans"] == 3  # column figures, text levels, one chunk of sums
    first = found["suggestions"][0]
    assert first["p_holm"] >= first["p_value"]
    assert first["reading"].startswith(f"{first['description']}: adding it would reduce the deviance by about ")
    assert first["reading"].endswith(f"after Holm adjustment over {found['tested']} candidates)")


def test_text_output_prints_the_plain_lines_counts_and_caution(leases):
    result = run_featpipe("suggest", "default_raw", "-p", str(leases), "--top", "5")
    assert result.returncode == 0, result.stderr
    assert "ratio of monthly_payment to monthly_revenue: adding it would reduce the deviance by about" in result.stdout
    assert "candidates generated" in result.stdout and "tested; dropped:" in result.stdout
    assert "caution: Candidates found by searching are hypotheses" in result.stdout


def test_max_candidates_caps_what_is_tested(leases):
    result = run_featpipe("suggest", "default_raw", "-p", str(leases), "--max-candidates", "7", "--json")
    found = json.loads(result.stdout)
    assert found["generated"] > 7 and found["considered"] == 7
    assert found["tested"] + sum(found["dropped"].values()) == 7


def test_min_rows_decides_which_text_levels_become_indicators(leases):
    def levels(min_rows: str) -> set[str]:
        found = json.loads(run_featpipe("suggest", "default_raw", "-p", str(leases), "--top", "1000", "--json",
                                        "--min-rows", min_rows).stdout)
        return {s["name"] for s in found["suggestions"] if s["kind"] == "level"}

    with duckdb.connect(str(leases / "build" / "lease_default.duckdb"), read_only=True) as connection:
        counts = dict(connection.execute(
            "SELECT sector, COUNT(*) FROM design_default_raw JOIN leases USING (lease_id) "
            f"WHERE NOT \"{HOLDOUT_COLUMN}\" AND log_revenue IS NOT NULL GROUP BY sector").fetchall())
    smallest = min(counts.values())
    assert levels("30") == {f"sector_is_{name}" for name in counts}
    assert levels(str(smallest + 1)) == {f"sector_is_{name}" for name, n in counts.items() if n > smallest}


def test_into_writes_a_term_file_that_checks_and_fits_once_its_terms_are_in_a_spec(leases, tmp_path):
    root = copy_demo("lease_default", tmp_path)
    result = run_featpipe("suggest", "default_raw", "-p", str(root), "--top", "5", "--into", "terms/proposed_default_raw.sql")
    assert result.returncode == 0, result.stderr
    written = root / "terms" / "proposed_default_raw.sql"
    text = written.read_text(encoding="utf-8")
    assert "-- Candidates found by searching are hypotheses" in text
    assert "after Holm adjustment over" in text
    names = [line.split(" AS ")[1].rstrip(",") for line in text.splitlines() if " AS " in line]
    assert len(names) == 5
    spec = root / "specs" / "default_raw.yaml"
    spec.write_text(spec.read_text(encoding="utf-8").replace("  - term_months\n", "  - term_months\n" + "".join(f"  - {n}\n" for n in names)),
                    encoding="utf-8")
    checked = run_featpipe("check", "-p", str(root))
    assert checked.returncode == 0, checked.stderr
    fitted = run_featpipe("fit", "default_raw", "-p", str(root), "--json")
    assert fitted.returncode == 0, fitted.stderr
    terms = [t["name"] for t in json.loads(fitted.stdout)[0]["fitted"]["terms"]]
    assert set(names) <= set(terms)


def test_into_refuses_to_overwrite_without_force(leases, tmp_path):
    root = copy_demo("lease_default", tmp_path)
    existing = root / "terms" / "proposed.sql"
    existing.write_text("-- mine\nSELECT monthly_payment * 2 AS double_payment FROM leases\n", encoding="utf-8")
    before = existing.read_bytes()
    refused = run_featpipe("suggest", "default_raw", "-p", str(root), "--into", "terms/proposed.sql")
    assert refused.returncode == 1
    assert refused.stderr.startswith(f"error: {existing} already exists; pass --force")
    assert "Traceback" not in refused.stderr
    assert existing.read_bytes() == before
    forced = run_featpipe("suggest", "default_raw", "-p", str(root), "--into", "terms/proposed.sql", "--force", "--top", "2")
    assert forced.returncode == 0, forced.stderr
    assert existing.read_bytes() != before and "featpipe suggest default_raw" in existing.read_text(encoding="utf-8")


def test_a_stale_fit_is_refused(tmp_path):
    root = copy_demo("lease_default", tmp_path)
    spec = root / "specs" / "default_raw.yaml"
    spec.write_text(spec.read_text(encoding="utf-8").replace("threshold: 0.2 ", "threshold: 0.25 "), encoding="utf-8")
    result = run_featpipe("suggest", "default_raw", "-p", str(root))
    assert result.returncode == 1
    assert result.stderr.startswith("error: fitted/default_raw.yaml is stale:")


def test_constant_collinear_and_mostly_null_candidates_are_dropped_with_a_count(tmp_path):
    rows = 400
    rng = np.random.default_rng(7)
    a = rng.normal(5, 1, rows).round(3)
    flag = np.ones(rows, dtype=int)  # constant
    twice = (2 * a).round(3)  # collinear with the model's term a
    sparse = np.where(np.arange(rows) % 10 == 0, rng.normal(size=rows).round(3), np.nan)  # 90% NULL
    y = (rng.random(rows) < 1 / (1 + np.exp(-(a - 5)))).astype(int)
    root = tmp_path / "drops"
    write_project(root, {
        "featpipe.yaml": """\
            name: drops
            engine: {kind: duckdb, path: build/drops.duckdb}
            inputs:
              cases:
                key: id
                load: data/cases.csv
                columns: {id: BIGINT, a: DOUBLE, flag: BIGINT, twice: DOUBLE, sparse: DOUBLE, y: BIGINT}
            """,
        "data/orders.csv": None, "terms/basket.sql": None, "specs/returns.yaml": None,
        "specs/m.yaml": "input: cases\ntarget: y\nfamily: binomial\nterms: [a]\n",
    })
    (root / "data").mkdir()
    pd.DataFrame({"id": range(1, rows + 1), "a": a, "flag": flag, "twice": twice, "sparse": sparse, "y": y}).to_csv(
        root / "data" / "cases.csv", index=False)
    project = load_project(root)
    api.fit(project, ["m"])
    report = api.suggest(project, "m", top=1000)
    tested = {s.name for s in report.suggestions}
    assert {"flag", "twice", "sparse"}.isdisjoint(tested)
    assert report.dropped["constant"] >= 1  # flag (and flag's products that stay constant)
    assert report.dropped["collinear"] >= 1  # twice
    assert report.dropped["mostly NULL"] >= 1  # sparse and everything built from it
    assert report.tested + sum(report.dropped.values()) == report.considered


def _statistics_on(engine, root: Path, model: str) -> tuple[dict[str, float], list[str]]:
    """The score statistic of every candidate `suggest` tests on `engine`, and the queries it ran."""
    project = load_project(root)
    compiled = api.check(project)
    chosen = compiled.models[model]
    build_designs(engine, project, [chosen], every_file=True)
    recording = Recording(engine)
    report = suggest_in(recording, compiled, chosen, read_fitted(project.fitted_path(model)), top=1000)
    return {s.name: s.statistic for s in report.suggestions}, recording.queries


@pytest.mark.parametrize("other", ["postgres", pytest.param("spark", marks=pytest.mark.spark)])
def test_statistics_are_equal_on_duckdb_postgres_and_spark(fitted_demos, request, other):
    """Threshold candidates sit at the columns' deciles and are named after them, so the same names also
    check the deciles (to the six digits a name shows)."""
    root = fitted_demos["fleet_claims"]  # claim_frequency has the SPLINE vehicle_age_curve
    project = load_project(root)
    from featpipe.engines.compute import connect

    with connect(project) as engine:
        reference, _ = _statistics_on(engine, root, "claim_frequency")
    engine = request.getfixturevalue(f"{other}_engine")
    found, queries = _statistics_on(engine, root, "claim_frequency")
    assert found.keys() == reference.keys() and len(found) > 50
    for name, statistic in reference.items():
        assert found[name] == pytest.approx(statistic, rel=1e-9), name  # DuckDB, the engine statsmodels checks above
    if other == "spark":  # its PERCENTILE_DISC holds every distinct value in the JVM's memory, once per fraction
        assert not any("PERCENTILE" in query.upper() for query in queries)
