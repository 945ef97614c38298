"""`featpipe suggest`: candidate terms ranked by score tests computed in the engine.

References outside the project: statsmodels' GLMResults.score_test (Rao's score test at the restricted
fit) on the same training rows read back from DuckDB; statsmodels' multipletests for Holm's
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
from statsmodels.stats.multitest import multipletests

from featpipe import api
from featpipe.engines.compute import build_designs
from featpipe.fitted import read_fitted
from featpipe.fitting.suggest import CAUTION
from featpipe.errors import FeatpipeError
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


def _fleet_project(tmp_path: Path) -> Path:
    """The fleet demo with the vehicle age as a plain column instead of its spline (suggest refuses learned terms)."""
    root = copy_demo("fleet_claims", tmp_path)
    spec = root / "specs" / "claim_frequency.yaml"
    spec.write_text(spec.read_text(encoding="utf-8").replace("- vehicle_age_curve", "- vehicle_age_years"), encoding="utf-8")
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


@pytest.mark.parametrize(
    ("demo", "model", "key", "input_name", "family"),
    [
        ("lease_default", "default_raw", "lease_id", "leases", sm.families.Binomial()),
        ("fleet_claims", "claim_frequency", "vehicle_year_id", "vehicle_years", sm.families.Poisson()),
        ("lease_default", "payment_size", "lease_id", "leases", sm.families.Gaussian()),
    ],
    ids=["binomial", "poisson with offset", "gaussian"],
)
def test_score_statistics_equal_statsmodels_score_test(tmp_path, demo, model, key, input_name, family):
    root = _lease_project(tmp_path) if demo == "lease_default" else _fleet_project(tmp_path)
    project = load_project(root)
    api.fit(project, [model])
    report = api.suggest(project, model, top=10)
    chosen = [s for s in report.suggestions if s.null_share == 0][:12]
    assert len(chosen) == 12
    frame = _training_frame(root, model, key, input_name, {s.name: s.sql for s in chosen})
    assert len(frame) == report.training_rows
    layout = api.check(project).models[model].layout
    X = sm.add_constant(frame[list(layout.terms)].to_numpy(float), has_constant="add")
    offset = frame[OFFSET_COLUMN].to_numpy(float) if layout.offset else None
    restricted = sm.GLM(frame[layout.target].to_numpy(float), X, family=family, offset=offset).fit(tol=1e-13)
    for suggestion in chosen:
        # statsmodels' score test for adding the column to the restricted fit (Rao 1948)
        statistic, p_value = restricted.score_test(exog_extra=frame[[suggestion.name]].to_numpy(float))[:2]
        assert suggestion.statistic == pytest.approx(float(np.squeeze(statistic)), rel=1e-8), suggestion.name
        assert suggestion.p_value == pytest.approx(float(np.squeeze(p_value)), rel=1e-6, abs=1e-300)


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


def _statistics_on(engine, root: Path, model: str) -> dict[str, float]:
    project = load_project(root)
    compiled = api.check(project)
    chosen = compiled.models[model]
    build_designs(engine, project, [chosen], every_file=True)
    report = suggest_in(engine, compiled, chosen, read_fitted(project.fitted_path(model)), top=1000)
    return {s.name: s.statistic for s in report.suggestions}


@pytest.mark.parametrize("other", ["postgres", pytest.param("spark", marks=pytest.mark.spark)])
def test_statistics_are_equal_on_duckdb_postgres_and_spark(tmp_path, request, other):
    root = _fleet_project(tmp_path)
    project = load_project(root)
    api.fit(project, ["claim_frequency"])
    from featpipe.engines.compute import connect

    with connect(project) as engine:
        reference = _statistics_on(engine, root, "claim_frequency")
    engine = request.getfixturevalue(f"{other}_engine")
    found = _statistics_on(engine, root, "claim_frequency")
    assert found.keys() == reference.keys() and len(found) > 50
    for name, statistic in reference.items():
        assert found[name] == pytest.approx(statistic, rel=1e-9), name  # DuckDB, the engine statsmodels checks above


def test_a_model_with_learned_terms_is_refused_with_a_clear_message(tmp_path):
    root = copy_demo("fleet_claims", tmp_path)  # claim_frequency has the SPLINE vehicle_age_curve
    project = load_project(root)
    with pytest.raises(FeatpipeError, match="learned terms \\(vehicle_age_curve\\)"):
        api.suggest(project, "claim_frequency", top=10)
