"""Splits and evaluation: the out-of-time holdout, `featpipe evaluate` on labelled tables, k-fold
cross-validation and `penalty: {l2: cv}`.

References outside the project: the rows held out are recomputed from the CSV file with Python's csv
and datetime; the folds with Python's hashlib (MD5, RFC 1321); every metric with scikit-learn on the
same rows; the fold refits "the slow way" with statsmodels' GLM (IRLS) and scikit-learn's
LogisticRegression, one fit per fold on the rows outside it. Data are invented (seeded numpy).
"""

from __future__ import annotations

import csv
import datetime
import hashlib
import io
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import yaml
from conftest import run_featpipe, write_project
from recording import Recording
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import brier_score_loss, log_loss, roc_auc_score
from sqlglot import exp

from featpipe import api
from featpipe.compiler.layout import DesignLayout
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.fitted import read_fitted
from featpipe.fitted.evaluations import read_evaluation
from featpipe.fitted.report import write_report
from featpipe.fitting import crossval
from featpipe.fitting.crossval import L2_GRID
from featpipe.glm.families import get_family
from featpipe.glm.folds import BatchFoldSource, FoldRequest, FoldSource, fit_folds
from featpipe.glm.irls import SETTLED
from featpipe.glm.penalty import ScaledPenalty
from featpipe.glm.sources import Scaling, engine_batches
from featpipe.project import load_project

COLUMNS = "{loan_id: BIGINT, signed_on: DATE, month_index: BIGINT, income: DOUBLE, debt: DOUBLE, region: VARCHAR, defaulted: BIGINT}"
PROJECT = f"""\
name: loans
engine: {{kind: duckdb, path: build/loans.duckdb}}
inputs:
  loans:
    key: loan_id
    load: data/loans.csv
    columns: {COLUMNS}
  loans_2026:
    key: loan_id
    load: data/loans_2026.csv
    columns: {COLUMNS}
"""
TERMS = "SELECT debt / NULLIF(income, 0) AS debt_ratio, income / 1000 AS income_k FROM loans\n"
SPEC = """\
input: loans
target: defaulted
family: binomial
terms: [debt_ratio, income_k]
"""
OUT_OF_TIME = SPEC + "holdout: {column: signed_on, from: 2025-10-01}\n"
TOLERANCE = 1e-8


def loans_csv(seed: int, rows: int, first_key: int, start: datetime.date, days: int) -> str:
    """Invented loans: default more likely with a larger debt-to-income ratio."""
    rng = np.random.default_rng(seed)
    lines = ["loan_id,signed_on,month_index,income,debt,region,defaulted"]
    for index in range(rows):
        signed = start + datetime.timedelta(days=int(rng.integers(0, days)))
        income = round(float(rng.lognormal(8, 0.4)), 2)
        debt = round(float(rng.uniform(0, 5000)), 2)
        chance = 1 / (1 + math.exp(-(-1 + 1.5 * debt / income - 0.1 * income / 1000)))
        lines.append(f"{first_key + index},{signed},{signed.month},{income},{debt},{'ns'[index % 2]},{int(rng.random() < chance)}")
    return "\n".join(lines) + "\n"


def loans_project(root: Path, spec: str = OUT_OF_TIME) -> Path:
    return write_project(root, {
        "featpipe.yaml": PROJECT, "terms/basket.sql": None, "specs/returns.yaml": None, "data/orders.csv": None,
        "data/loans.csv": loans_csv(7, 600, 1000, datetime.date(2025, 1, 1), 365),
        "data/loans_2026.csv": loans_csv(8, 300, 5000, datetime.date(2026, 1, 1), 120),
        "terms/loans.sql": TERMS, "specs/risk.yaml": spec,
    })


def csv_rows(path: Path) -> list[dict]:
    with path.open(newline="") as rows:
        return list(csv.DictReader(rows))


def features(rows: list[dict]) -> tuple[np.ndarray, np.ndarray]:
    """The model's terms computed in Python from the CSV rows, and the target."""
    x = np.array([[float(r["debt"]) / float(r["income"]), float(r["income"]) / 1000] for r in rows])
    return x, np.array([float(r["defaulted"]) for r in rows])


def predicted(fitted_file: Path, x: np.ndarray) -> np.ndarray:
    coefficients = read_fitted(fitted_file).coefficients
    eta = coefficients["(intercept)"] + x @ np.array([coefficients["debt_ratio"], coefficients["income_k"]])
    return 1 / (1 + np.exp(-eta))


# --- out-of-time holdout ---------------------------------------------------------------------------------


def test_out_of_time_holdout_holds_out_the_rows_on_or_after_the_date(tmp_path):
    root = loans_project(tmp_path / "loans")
    api.fit(load_project(root))
    fitted = read_fitted(root / "fitted/risk.yaml")
    rows = csv_rows(root / "data/loans.csv")
    # Python's datetime on the CSV file: rows signed on or after 2025-10-01 are held out.
    late = [r for r in rows if datetime.date.fromisoformat(r["signed_on"]) >= datetime.date(2025, 10, 1)]
    assert (fitted.rows["train"], fitted.rows["holdout"]) == (len(rows) - len(late), len(late))
    assert fitted.holdout == {"column": "signed_on", "from": "2025-10-01", "salt": "v1"}
    x, y = features(late)
    # scikit-learn's AUC on the same held-out rows, scored with the fitted coefficients
    assert fitted.metrics["auc"] == pytest.approx(roc_auc_score(y, predicted(root / "fitted/risk.yaml", x)), abs=1e-10)


def test_out_of_time_holdout_by_a_number_column(tmp_path):
    root = loans_project(tmp_path / "loans", SPEC + "holdout: {column: month_index, from: 10}\n")
    api.fit(load_project(root))
    late = [r for r in csv_rows(root / "data/loans.csv") if int(r["month_index"]) >= 10]
    assert read_fitted(root / "fitted/risk.yaml").rows["holdout"] == len(late)


@pytest.mark.parametrize("holdout, message", [
    ("{column: signed_at, from: 2025-10-01}", "specs/risk.yaml:5:19: holdout column 'signed_at' is not a column of input 'loans'; did you mean 'signed_on'?"),
    ("{column: region, from: 2025-10-01}", "specs/risk.yaml:5:19: holdout column 'region' is VARCHAR; an out-of-time holdout needs a date, timestamp or numeric column"),
    ("{column: signed_on, from: 10}", "specs/risk.yaml:5:36: holdout from must be a date like 2025-07-01 for the DATE column 'signed_on', not 10"),
    ("{column: month_index, from: 2025-10-01}", "specs/risk.yaml:5:38: holdout from must be a number for the BIGINT column 'month_index', not datetime.date(2025, 10, 1)"),
    ("{column: signed_on, from: 2025-10-01, fraction: 0.3}", "specs/risk.yaml:5:48: holdout takes either fraction (a random share of rows) or column and from (out of time), not both; remove one"),
])
def test_check_refuses_a_wrong_out_of_time_holdout(tmp_path, holdout, message):
    root = loans_project(tmp_path / "loans", SPEC + f"holdout: {holdout}\n")
    result = run_featpipe("check", "-p", str(root))
    assert result.returncode == 1, result.stdout
    assert message in result.stderr
    assert "Traceback" not in result.stderr


def test_changing_the_out_of_time_boundary_makes_the_fit_stale(tmp_path):
    root = loans_project(tmp_path / "loans")
    api.fit(load_project(root))
    (root / "specs/risk.yaml").write_text(OUT_OF_TIME.replace("2025-10-01", "2025-11-01"))
    result = run_featpipe("check", "-p", str(root))
    assert "fitted/risk.yaml is stale: holdout from changed from 2025-10-01 to 2025-11-01" in result.stdout + result.stderr


# --- featpipe evaluate -------------------------------------------------------------------------------------


def test_evaluate_measures_a_labelled_table_whole_and_by_month(tmp_path):
    root = loans_project(tmp_path / "loans")
    api.fit(load_project(root))
    result = run_featpipe("evaluate", "risk", "--table", "loans_2026", "--by", "month_of(signed_on)", "-p", str(root))
    assert result.returncode == 0, result.stderr
    path = root / "fitted/risk.evaluations/loans_2026.yaml"
    evaluation = read_evaluation(path)
    rows = csv_rows(root / "data/loans_2026.csv")
    # scikit-learn on the same rows, scored in Python with the fitted coefficients
    batches = {"all": rows}
    for r in sorted(rows, key=lambda r: r["signed_on"]):
        batches.setdefault(r["signed_on"][:7], []).append(r)
    measured = {"all": evaluation.metrics} | {item["period"]: item["metrics"] for item in evaluation.periods}
    assert list(measured) == list(batches)
    for label, batch in batches.items():
        x, y = features(batch)
        p = predicted(root / "fitted/risk.yaml", x)
        metrics = measured[label]
        assert metrics["rows"] == len(batch) and metrics["events"] == int(y.sum())
        assert metrics["auc"] == pytest.approx(roc_auc_score(y, p), abs=1e-10)
        assert metrics["log_loss"] == pytest.approx(log_loss(y, p), abs=1e-10)
        assert metrics["brier"] == pytest.approx(brier_score_loss(y, p), abs=1e-10)
    assert "2026-03" in result.stdout and "observed / predicted" in result.stdout


def test_evaluation_file_is_deterministic_and_validated_when_read(tmp_path):
    root = loans_project(tmp_path / "loans")
    api.fit(load_project(root))
    path = root / "fitted/risk.evaluations/loans_2026.yaml"
    api.evaluate(load_project(root), "risk", "loans_2026", "month_index")
    first = path.read_bytes()
    api.evaluate(load_project(root), "risk", "loans_2026", "month_index")
    assert path.read_bytes() == first
    data = yaml.safe_load(first)
    assert [item["period"] for item in data["periods"]] == ["1", "2", "3", "4"]
    data["periods"][1]["metrics"]["auc"] = "high"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    with pytest.raises(api.FeatpipeError, match=r"risk.evaluations/loans_2026.yaml: periods\[1\].metrics.auc must be a finite number"):
        read_evaluation(path)
    path.write_text("model: risk\nperiods: [\n")
    with pytest.raises(api.FeatpipeError, match=r"loans_2026.yaml: not an evaluation file featpipe can read \(YAML error at line 3"):
        read_evaluation(path)


def test_evaluate_refuses_a_stale_fit_and_tables_it_cannot_measure(tmp_path):
    root = loans_project(tmp_path / "loans")
    api.fit(load_project(root))
    refused = run_featpipe("evaluate", "risk", "--table", "new_loans", "-p", str(root))
    assert refused.returncode == 1 and "--table new_loans: not an input of featpipe.yaml" in refused.stderr
    refused = run_featpipe("evaluate", "risk", "--table", "loans_2026", "--by", "month_of(income)", "-p", str(root))
    assert refused.returncode == 1 and "month_of needs a date or timestamp column, and 'income' is DOUBLE" in refused.stderr
    unlabelled = COLUMNS.replace(", defaulted: BIGINT", "").join(PROJECT.rsplit(COLUMNS, 1))  # loans_2026 without the target
    (root / "featpipe.yaml").write_text(unlabelled)
    refused = run_featpipe("evaluate", "risk", "--table", "loans_2026", "-p", str(root))
    assert refused.returncode == 1 and "input 'loans_2026' cannot be evaluated with model 'risk': 'defaulted' is missing" in refused.stderr
    (root / "featpipe.yaml").write_text(PROJECT)
    (root / "terms/loans.sql").write_text(TERMS.replace("income / 1000", "income / 100"))
    refused = run_featpipe("evaluate", "risk", "--table", "loans_2026", "-p", str(root))
    assert refused.returncode == 1 and "fitted/risk.yaml is stale: term 'income_k' changed meaning" in refused.stderr
    assert not (root / "fitted/risk.evaluations").exists()


# --- k-fold cross-validation ---------------------------------------------------------------------------------

FOLDED = SPEC + "folds: 5\n"


def md5_digits(text: str) -> str:
    return hashlib.md5(text.encode()).hexdigest()[:8]


def training_folds(root: Path, folds: int, fraction: float = 0.3) -> tuple[list[dict], np.ndarray]:
    """The training rows (hash split, fraction 0.3, salt v1) and each one's fold, recomputed with hashlib:
    held out when the first 8 hex digits of MD5('v1:' key) fall below fraction * 16^8; fold f when the
    digits of MD5('v1:folds:' key) fall in the f-th of `folds` equal ranges."""
    rows = [r for r in csv_rows(root / "data/loans.csv") if int(md5_digits(f"v1:{r['loan_id']}"), 16) >= round(fraction * 16**8)]
    fold = np.array([sum(int(md5_digits(f"v1:folds:{r['loan_id']}"), 16) >= round(i / folds * 16**8) for i in range(1, folds))
                     for r in rows])
    return rows, fold


def test_cross_validation_gives_the_metrics_of_fold_refits_done_the_slow_way(tmp_path):
    root = loans_project(tmp_path / "loans", FOLDED)
    api.fit(load_project(root))
    crossval = read_fitted(root / "fitted/risk.yaml").crossval
    rows, fold = training_folds(root, 5)
    x, y = features(rows)
    expected = []
    for index in range(5):
        inside, outside = fold == index, fold != index
        # statsmodels' GLM (IRLS) fitted on the other folds' rows, measured with scikit-learn on this fold's
        refit = sm.GLM(y[outside], sm.add_constant(x[outside]), family=sm.families.Binomial()).fit(tol=1e-12)
        p = refit.predict(sm.add_constant(x[inside]))
        measured = crossval["per_fold"][index]
        assert (measured["fold"], measured["train"], measured["metrics"]["rows"]) == (index + 1, int(outside.sum()), int(inside.sum()))
        figures = {"auc": roc_auc_score(y[inside], p), "log_loss": log_loss(y[inside], p), "brier": brier_score_loss(y[inside], p)}
        for name, value in figures.items():
            assert measured["metrics"][name] == pytest.approx(value, abs=TOLERANCE), (index, name)
        expected.append(figures)
    for name in ("auc", "log_loss", "brier"):  # numpy: mean and sample sd over the folds
        values = np.array([figures[name] for figures in expected])
        assert crossval["mean"][name] == pytest.approx(values.mean(), abs=TOLERANCE)
        assert crossval["sd"][name] == pytest.approx(values.std(ddof=1), abs=TOLERANCE)
    assert crossval["passes"] < 5 * 5  # all folds fitted together: fewer passes than five separate fits take
    result = run_featpipe("check", "-p", str(root))
    assert result.returncode == 0 and "stale" not in result.stdout
    (root / "specs/risk.yaml").write_text(SPEC + "folds: 4\n")
    result = run_featpipe("check", "-p", str(root))
    assert "fitted/risk.yaml is stale: folds changed from 5 to 4" in result.stdout


def test_penalty_l2_cv_picks_the_strength_with_the_smallest_cross_validated_deviance(tmp_path):
    root = loans_project(tmp_path / "loans", SPEC + "folds: 3\npenalty: {l2: cv}\n")
    api.fit(load_project(root))
    fitted = read_fitted(root / "fitted/risk.yaml")
    choice = fitted.crossval["l2"]
    rows, fold = training_folds(root, 3)
    x, y = features(rows)
    standardized = (x - x.mean(axis=0)) / x.std(axis=0)  # by the training rows' mean and population sd
    deviances = []
    for l2 in L2_GRID:
        total = 0.0
        for index in range(3):
            inside, outside = fold == index, fold != index
            # scikit-learn minimizes C * sum of log losses + |b|^2 / 2: the same minimum as
            # deviance / (2 N) + l2 / 2 |b|^2 when C = 1 / (l2 N), N the rows it is fitted on
            model = LogisticRegression(C=1 / (l2 * outside.sum()), tol=1e-12, max_iter=100_000)
            model.fit(standardized[outside], y[outside])
            total += 2 * log_loss(y[inside], model.predict_proba(standardized[inside])[:, 1], normalize=False)
        deviances.append(total)
    assert choice["grid"] == list(L2_GRID)
    assert choice["deviance"] == pytest.approx(deviances, rel=1e-6)
    assert choice["chosen"] == L2_GRID[int(np.argmin(deviances))]
    assert fitted.penalty == {"l2": "cv", "l1": 0.0} and fitted.fit["penalized"]


@pytest.mark.parametrize("kind", ["duckdb", "postgres"])
def test_fold_fits_read_the_rows_with_their_fold_instead_of_summing_each_pass_by_fold(tmp_path, request, monkeypatch, kind):
    """Where a fit reads the training rows out (DuckDB streams them, PostgreSQL copies them once), the
    folds' passes do too, each row with its fold: no aggregate grouped by fold per pass (about 2 s a pass
    on 1M rows in DuckDB, against 0.6 s streamed). The choice equals the grouped aggregates' (the route
    Spark keeps), and the test above checks it against scikit-learn."""
    spec = SPEC + "folds: 3\npenalty: {l2: cv}\n"
    root = loans_project(tmp_path / kind, spec)
    if kind == "postgres":
        (root / "featpipe.yaml").write_text(PROJECT.replace("{kind: duckdb, path: build/loans.duckdb}", engine_block(kind, request)))
    recorded = []
    choose = crossval.chosen_penalty

    def recording(engine, layout, model_spec):
        recorded.append(Recording(engine))
        return choose(recorded[-1], layout, model_spec)

    monkeypatch.setattr(crossval, "chosen_penalty", recording)
    api.fit(load_project(root))
    choice = read_fitted(root / "fitted/risk.yaml").crossval["l2"]
    fold_queries = [query for query in recorded[0].queries if "v1:folds" in query]
    assert not [query for query in fold_queries if "SUM(" in query]  # only the fold sizes' COUNT(*) is an aggregate
    streamed = [query for query in fold_queries if "GROUP BY" not in query]  # the rows, each with its fold
    assert len(streamed) == len(fold_queries) - 1
    assert len(streamed) == 1 if kind == "postgres" else len(streamed) > len(L2_GRID)  # a copy, or a stream per pass
    monkeypatch.setattr(crossval, "AUTO_SOURCES", {})  # every engine as Spark: a grouped aggregate per pass
    api.fit(load_project(root))
    summed = read_fitted(root / "fitted/risk.yaml").crossval["l2"]
    assert choice["deviance"] == pytest.approx(summed["deviance"], rel=1e-10) and choice["chosen"] == summed["chosen"]


def test_with_l2_cv_the_folds_measured_are_those_the_search_fitted_at_the_chosen_strength(tmp_path, monkeypatch):
    """No fold is fitted again after the search (on 1M rows x 25 terms that refit took ~8 passes): the
    per-fold metrics equal those of a spec that names the chosen strength and fits its folds afresh."""
    root = loans_project(tmp_path / "loans", SPEC + "folds: 3\npenalty: {l2: cv}\n")
    recorded = []
    measure = crossval.cross_validation

    def recording(engine, *arguments):
        recorded.append(Recording(engine))
        return measure(recorded[-1], *arguments)

    monkeypatch.setattr(crossval, "cross_validation", recording)
    api.fit(load_project(root))
    assert not [query for query in recorded[0].queries if '"_group"' in query]  # no fold's rows read to fit it
    assert not [query for query in recorded[0].queries if "v1:folds" in query and "GROUP BY" in query]  # nor the folds sized again
    searched = read_fitted(root / "fitted/risk.yaml").crossval
    (root / "specs/risk.yaml").write_text(SPEC + f"folds: 3\npenalty: {{l2: {searched['l2']['chosen']}}}\n")
    api.fit(load_project(root))
    afresh = read_fitted(root / "fitted/risk.yaml").crossval
    for mine, theirs in zip(searched["per_fold"], afresh["per_fold"], strict=True):
        assert (mine["fold"], mine["train"], mine["converged"]) == (theirs["fold"], theirs["train"], theirs["converged"])
        for name in ("auc", "log_loss", "brier", "calibration_slope"):
            assert mine["metrics"][name] == pytest.approx(theirs["metrics"][name], rel=1e-8), (mine["fold"], name)


def test_the_folds_start_from_the_model_fitted_on_every_training_row(tmp_path, monkeypatch):
    """A model fitted without one fold lies near the model fitted with all of them: started there, the
    folds take fewer passes than from the intercept-only start, to the same models."""
    root = loans_project(tmp_path / "loans", FOLDED)
    api.fit(load_project(root))
    warm = read_fitted(root / "fitted/risk.yaml").crossval
    monkeypatch.setattr(crossval._Folds, "standardized", lambda folds, coefficients: folds.start)
    api.fit(load_project(root))
    cold = read_fitted(root / "fitted/risk.yaml").crossval
    assert warm["passes"] < cold["passes"]
    for mine, theirs in zip(warm["per_fold"], cold["per_fold"], strict=True):
        assert mine["converged"] and theirs["converged"]
        for name in ("auc", "log_loss", "brier", "calibration_slope"):
            assert mine["metrics"][name] == pytest.approx(theirs["metrics"][name], rel=1e-8), (mine["fold"], name)


def loaded_design(tmp_path: Path, frame: pd.DataFrame, layout: DesignLayout) -> DuckDBEngine:
    """`frame` as the design table of `layout` in a DuckDB file, loaded from Parquet."""
    frame.to_parquet(tmp_path / "design.parquet", index=False)
    engine = DuckDBEngine(tmp_path / "design.duckdb")
    engine.load_file(layout.table, tmp_path / "design.parquet")
    return engine


def test_streamed_fold_fits_with_an_offset_and_weights_equal_statsmodels_refits_and_the_grouped_queries(tmp_path):
    """Poisson counts over an exposure (the offset), with variance weights, in three folds (key mod 3):
    each fold's model from the streamed rows equals statsmodels' GLM refitted on the other folds' rows,
    and both routes give the same coefficients and held-out deviances."""
    rng = np.random.default_rng(11)
    rows = 3_000
    x = rng.normal(size=(rows, 2)) * [1.0, 3.0] + [0.2, -1.0]
    exposure, weight = rng.uniform(0.5, 2.0, rows), rng.uniform(0.5, 1.5, rows)
    y = rng.poisson(exposure * np.exp(-0.4 + x @ [0.5, -0.2])).astype(float)
    frame = pd.DataFrame({"id": np.arange(rows), "y": y, "log_exposure": np.log(exposure), "w": weight, "_holdout": False,
                          "a": x[:, 0], "b": x[:, 1]})
    layout = DesignLayout("design_counts", "id", "y", ("a", "b"), offset="log_exposure", weight="w")
    engine = loaded_design(tmp_path, frame, layout)
    fold = exp.Mod(this=exp.column("id", quoted=True), expression=exp.Literal.number(3))
    family, scaling = get_family("poisson"), Scaling.of([x[:, 0], x[:, 1]])
    weights = {index: float(weight[frame["id"] % 3 == index].sum()) for index in range(3)}
    start = np.r_[np.log(y.sum() / exposure.sum()), 0.0, 0.0]
    fits = {
        "grouped": fit_folds(FoldSource(engine, layout, family, scaling, fold, weights), [start] * 3, ScaledPenalty(), weight.sum()),
        "streamed": fit_folds(BatchFoldSource(engine_batches(engine, layout, 1_000, group=fold), layout, family, scaling, weights),
                              [start] * 3, ScaledPenalty(), weight.sum()),
    }
    for index in range(3):
        outside = frame["id"].to_numpy() % 3 != index
        # statsmodels' GLM (IRLS), Poisson with the log exposure as offset and the weights as var_weights
        refit = sm.GLM(y[outside], sm.add_constant(x[outside]), family=sm.families.Poisson(), offset=np.log(exposure[outside]),
                       var_weights=weight[outside]).fit(tol=1e-12)
        for route, fitted in fits.items():
            np.testing.assert_allclose(scaling.to_original() @ fitted.results[index].beta, refit.params, rtol=1e-8, err_msg=route)
    np.testing.assert_allclose(fits["streamed"].held_out_deviance, fits["grouped"].held_out_deviance, rtol=1e-10)
    assert fits["streamed"].passes == fits["grouped"].passes
    engine.close()


@pytest.mark.parametrize("settings, message", [
    ("folds: 1\n", "specs/risk.yaml:5:8: folds must be a whole number from 2 to 20 (or 0 for none), not 1"),
    ("folds: 0\npenalty: {l2: cv}\n", "specs/risk.yaml:5:8: penalty l2: cv chooses the strength by cross-validation; set folds to 2 or more"),
])
def test_check_refuses_folds_it_cannot_use(tmp_path, settings, message):
    root = loans_project(tmp_path / "loans", SPEC + settings)
    result = run_featpipe("check", "-p", str(root))
    assert result.returncode == 1 and message in result.stderr


def test_the_report_shows_the_split_the_folds_and_the_evaluations_beside_the_holdout(tmp_path):
    root = loans_project(tmp_path / "loans", OUT_OF_TIME + "folds: 3\n")
    project = load_project(root)
    api.fit(project)
    api.evaluate(project, "risk", "loans_2026", "month_of(signed_on)")
    page = write_report(project, "risk").read_text()
    fitted = read_fitted(root / "fitted/risk.yaml")
    evaluation = read_evaluation(root / "fitted/risk.evaluations/loans_2026.yaml")
    assert "<td>held out (out of time)</td><td class=\"num\">signed_on on or after 2025-10-01</td>" in page
    table = page[page.index('<table id="validation">'):]
    table = table[: table.index("</table>")]
    for label, metrics in [("holdout", fitted.metrics), ("cross-validation fold 3 of 3", fitted.crossval["per_fold"][2]["metrics"]),
                           ("table loans_2026", evaluation.metrics),
                           ("table loans_2026, month_of(signed_on) 2026-02", evaluation.periods[1]["metrics"])]:
        assert f"<tr><td>{label}</td><td class=\"num\">{metrics['rows']}</td><td class=\"num\">{metrics['auc']:.4f}</td>" in table


# --- the same on PostgreSQL and Spark -------------------------------------------------------------------------


def engine_block(kind: str, request) -> str:
    """The project's engine block for `kind`, on a schema or database of its own (the fixtures start the engines)."""
    if kind == "postgres":
        import psycopg
        from psycopg.conninfo import make_conninfo

        dsn = request.getfixturevalue("postgres_dsn")
        with psycopg.connect(dsn, autocommit=True) as admin:
            admin.execute("DROP SCHEMA IF EXISTS featpipe_splits CASCADE")
            admin.execute("CREATE SCHEMA featpipe_splits")
        request.getfixturevalue("monkeypatch").setenv("FEATPIPE_TEST_DSN", make_conninfo(dsn, options="-c search_path=featpipe_splits"))
        return "{kind: postgres, dsn: '${FEATPIPE_TEST_DSN}'}"
    request.getfixturevalue("spark_session")
    return "{kind: spark, path: build/spark, database: featpipe_splits}"


@pytest.mark.parametrize("kind", ["postgres", pytest.param("spark", marks=pytest.mark.spark)])
def test_splits_folds_and_evaluations_are_the_same_on_every_engine(tmp_path, request, kind):
    spec = OUT_OF_TIME + "folds: 3\n"
    reference = loans_project(tmp_path / "duckdb", spec)
    api.fit(load_project(reference))
    api.evaluate(load_project(reference), "risk", "loans_2026", "month_of(signed_on)")
    root = loans_project(tmp_path / kind, spec)
    (root / "featpipe.yaml").write_text(PROJECT.replace("{kind: duckdb, path: build/loans.duckdb}", engine_block(kind, request)))
    api.fit(load_project(root))
    api.evaluate(load_project(root), "risk", "loans_2026", "month_of(signed_on)")
    # DuckDB's run, which the tests above check against scikit-learn and statsmodels, is the reference.
    for relative in ("fitted/risk.yaml", "fitted/risk.evaluations/loans_2026.yaml"):
        mine, theirs = yaml.safe_load((root / relative).read_text()), yaml.safe_load((reference / relative).read_text())
        if relative == "fitted/risk.yaml":
            mine, theirs = mine["crossval"] | {"rows": mine["rows"]}, theirs["crossval"] | {"rows": theirs["rows"]}
        else:
            mine.pop("fitted"), theirs.pop("fitted")
        assert_close(mine, theirs, relative)


def assert_close(mine, theirs, where: str) -> None:
    if isinstance(mine, dict):
        assert list(mine) == list(theirs), where
        for key in mine:
            assert_close(mine[key], theirs[key], f"{where}.{key}")
    elif isinstance(mine, list):
        assert len(mine) == len(theirs), where
        for index, (a, b) in enumerate(zip(mine, theirs)):
            assert_close(a, b, f"{where}[{index}]")
    elif isinstance(mine, float):
        assert mine == pytest.approx(theirs, rel=TOLERANCE, abs=1e-12), where
    else:
        assert mine == theirs, where


def loan_folds(tmp_path: Path):
    """The loans' training rows as a design table in DuckDB, in three folds (key mod 3), and a function
    fitting the folds at a strength from given starts (standardized coefficients), read as streamed batches."""
    rows = list(csv.DictReader(io.StringIO(loans_csv(7, 600, 1000, datetime.date(2025, 1, 1), 365))))
    x, y = features(rows)
    frame = pd.DataFrame({"loan_id": [int(r["loan_id"]) for r in rows], "defaulted": y, "_holdout": False,
                          "debt_ratio": x[:, 0], "income_k": x[:, 1]})
    layout = DesignLayout("design_risk", "loan_id", "defaulted", ("debt_ratio", "income_k"))
    engine = loaded_design(tmp_path, frame, layout)
    fold = exp.Mod(this=exp.column("loan_id", quoted=True), expression=exp.Literal.number(3))
    weights = {index: float((frame["loan_id"] % 3 == index).sum()) for index in range(3)}
    family, scaling = get_family("binomial"), Scaling.of([frame[name].to_numpy() for name in layout.terms])

    def source() -> BatchFoldSource:
        return BatchFoldSource(engine_batches(engine, layout, 100, group=fold), layout, family, scaling, weights)

    def fit(starts, l2, first=None):
        return fit_folds(source(), starts, ScaledPenalty(l2), sum(weights.values()), first=first)

    return fit, source, engine


def test_a_penalty_path_reads_no_pass_again_where_the_last_strength_ended(tmp_path):
    """The sums at a strength's final coefficients are the next strength's first step (they do not depend
    on the penalty): given as `first`, the next fit makes one pass fewer and ends at the same coefficients."""
    fit, _, engine = loan_folds(tmp_path)
    strong = fit([np.zeros(3)] * 3, 1.0)
    again, reused = fit([result.beta for result in strong.results], 0.1), fit([result.beta for result in strong.results], 0.1, strong.final)
    assert reused.passes == again.passes - 1
    for mine, theirs in zip(reused.results, again.results, strict=True):
        np.testing.assert_array_equal(mine.beta, theirs.beta)
    assert reused.held_out_deviance == again.held_out_deviance
    engine.close()


def test_the_held_out_deviances_come_from_the_pass_that_evaluated_the_final_coefficients(tmp_path):
    """IRLS ends with a pass at the final coefficients unless its last step was already negligible
    (irls.SETTLED): the held-out deviances are read from that pass, with no pass more, and equal a
    fresh evaluation there."""
    fit, source, engine = loan_folds(tmp_path)
    fits = fit([np.zeros(3)] * 3, 1.0)
    assert all(result.change > SETTLED for result in fits.results)  # every fold's last pass was at its final coefficients
    assert fits.passes == max(result.iterations for result in fits.results)
    fresh = source()
    fresh.evaluate([FoldRequest((0, 1), result.beta, fold) for fold, result in enumerate(fits.results)])
    assert fits.held_out_deviance == tuple(fresh.book.held_out[fold].deviance for fold in range(3))
    engine.close()
