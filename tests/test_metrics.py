"""Holdout metrics computed in SQL, checked against scikit-learn (the reference library) on DuckDB, SQLite
and PostgreSQL.

Each test writes an invented design table to a Parquet file, loads it into a real engine through the
engine's own `load_file`, and compares every metric the engine computes with scikit-learn's value on
the same held-out rows, to 1e-12.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlglot
import statsmodels.api as sm
import yaml
from conftest import copy_demo, run_featpipe
from delong_reference import delong_reference
from recording import Recording
from scipy.stats import ks_2samp, norm
from sklearn.metrics import (
    accuracy_score,
    brier_score_loss,
    log_loss,
    mean_absolute_error,
    mean_poisson_deviance,
    mean_squared_error,
    precision_score,
    recall_score,
    roc_auc_score,
)
from sqlglot import exp
from sqlite_engine import SQLiteEngine

from featpipe.compiler.layout import DesignLayout
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.fitting.metrics import holdout_metrics, scored_rows_metrics
from featpipe.fitted import INTERCEPT
from featpipe.glm.delong import paired_test
from featpipe.sqlgen.common import alias, number
from featpipe.sqlgen.metrics import linear_predictor, prediction, scored_holdout
from featpipe.sqlgen.ranks import rank_components_query, read_rank_sums

TOLERANCE = 1e-12
ENGINES = {"duckdb": DuckDBEngine, "sqlite": SQLiteEngine}
ENGINE_KINDS = ["duckdb", "sqlite", "postgres"]
EMBEDDED = ["duckdb", "sqlite"]  # checks of edge cases, where a throwaway PostgreSQL database per test costs more than it adds

ROWS = 600

BINOMIAL = DesignLayout("design_churn", "account_id", "_target", ("tenure_band", "support_calls"))
BINOMIAL_COEFFICIENTS = {INTERCEPT: -0.75, "tenure_band": -0.375, "support_calls": 0.5}
POISSON = DesignLayout("design_claims", "vehicle_id", "_target", ("engine_litres", "urban"), offset="_offset")
POISSON_COEFFICIENTS = {INTERCEPT: -2.1, "engine_litres": 0.31, "urban": 0.45}
GAUSSIAN = DesignLayout("design_spend", "order_id", "_target", ("items", "discount"))
GAUSSIAN_COEFFICIENTS = {INTERCEPT: 12.5, "items": 3.25, "discount": -40.0}

TABLES = [
    (BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 11),
    (POISSON, "poisson", POISSON_COEFFICIENTS, 12),
    (GAUSSIAN, "gaussian", GAUSSIAN_COEFFICIENTS, 13),
]


def invented_table(layout: DesignLayout, family: str, coefficients: dict, seed: int, holdout_share: float = 0.4) -> pa.Table:
    """A design table of invented rows; discrete terms so that many predictions tie, and some NULL terms."""
    rng = np.random.default_rng(seed)
    first, second = layout.terms
    data = {layout.key: np.arange(1, ROWS + 1, dtype=np.int64)}
    if family == "binomial":
        data[first] = rng.integers(0, 5, ROWS).astype(float)
        data[second] = rng.integers(0, 4, ROWS).astype(float)
    elif family == "poisson":
        data[first] = rng.choice([1.2, 1.6, 2.0, 3.0], ROWS)
        data[second] = rng.integers(0, 2, ROWS).astype(float)
        data[layout.offset] = np.log(rng.uniform(0.25, 2.0, ROWS))
    else:
        data[first] = rng.integers(1, 9, ROWS).astype(float)
        data[second] = rng.choice([0.0, 0.1, 0.25], ROWS)
    eta = reference_eta(layout, coefficients, data)
    if family == "binomial":
        target = (rng.uniform(size=ROWS) < 1 / (1 + np.exp(-eta))).astype(float)
    elif family == "poisson":
        target = rng.poisson(np.exp(eta)).astype(float)
    else:
        target = eta + rng.normal(0, 4.0, ROWS)
    columns = {**data, layout.target: target, layout.holdout: rng.uniform(size=ROWS) < holdout_share}
    missing = rng.uniform(size=ROWS) < 0.05  # NULL terms: such rows are not complete and take no part
    return pa.table({
        name: pa.array(values, mask=missing if name == second else None) for name, values in columns.items()
    })


def reference_eta(layout: DesignLayout, coefficients: dict, data) -> np.ndarray:
    """The linear predictor in numpy, in the same order of operations as the SQL."""
    eta = np.full(len(data[layout.key]), coefficients[INTERCEPT])
    for term in layout.terms:
        eta = eta + coefficients[term] * np.asarray(data[term], dtype=float)
    if layout.offset:
        eta = eta + np.asarray(data[layout.offset], dtype=float)
    return eta


def held_out(table: pa.Table, layout: DesignLayout) -> dict[str, np.ndarray]:
    """The held-out complete rows of `table`, as numpy arrays (the rows the metrics must use)."""
    frame = table.to_pandas()
    rows = frame[frame[layout.holdout] & frame[list(layout.model_columns)].notna().all(axis=1)]
    return {name: rows[name].to_numpy() for name in rows.columns}


def open_engine(request):
    """An embedded engine, or PostgreSQL from the shared fixture (a throwaway server; see fixtures_engines)."""
    if request.param == "postgres":
        return request.getfixturevalue("postgres_engine")
    return ENGINES[request.param](None)


@pytest.fixture(params=ENGINE_KINDS)
def bare_engine(request):
    engine = open_engine(request)
    yield engine
    if request.param != "postgres":  # the postgres fixture closes its own engine
        engine.close()


@pytest.fixture(params=ENGINE_KINDS)
def engine(request, tmp_path):
    """A real engine holding the three invented design tables (and one without a holdout)."""
    engine = open_engine(request)
    for layout, family, coefficients, seed in TABLES:
        path = tmp_path / f"{layout.table}.parquet"
        pq.write_table(invented_table(layout, family, coefficients, seed), path)
        engine.load_file(layout.table, path)
    no_holdout = tmp_path / "design_no_holdout.parquet"
    pq.write_table(invented_table(BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 5, holdout_share=0.0), no_holdout)
    engine.load_file("design_no_holdout", no_holdout)
    yield engine
    if request.param != "postgres":  # the postgres fixture closes its own engine
        engine.close()


def reference_rows(layout, family, coefficients, seed):
    rows = held_out(invented_table(layout, family, coefficients, seed), layout)
    eta = reference_eta(layout, coefficients, rows)
    predicted = 1 / (1 + np.exp(-eta)) if family == "binomial" else np.exp(eta) if family == "poisson" else eta
    return rows, predicted


def reference_calibration(rows: dict, layout: DesignLayout, predicted: np.ndarray) -> list[tuple]:
    """Deciles as SQL's NTILE(10) forms them (the first n mod 10 groups one row larger, which is what
    np.array_split does), after sorting by prediction, then key."""
    order = np.lexsort((rows[layout.key], predicted))
    return [
        (decile, len(group), predicted[group].mean(), rows[layout.target][group].mean())
        for decile, group in enumerate(np.array_split(order, 10), start=1)
    ]


def assert_calibration(got: list[dict], expected: list[tuple]) -> None:
    assert [(entry["decile"], entry["rows"]) for entry in got] == [(d, n) for d, n, _, _ in expected]
    for entry, (_, _, mean_predicted, mean_observed) in zip(got, expected):
        assert entry["mean_predicted"] == pytest.approx(mean_predicted, rel=TOLERANCE, abs=TOLERANCE)
        assert entry["mean_observed"] == pytest.approx(mean_observed, rel=TOLERANCE, abs=TOLERANCE)


def test_binomial_metrics_match_scikit_learn(engine):
    threshold = 0.3
    metrics = holdout_metrics(engine, BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, threshold)
    rows, p = reference_rows(BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 11)
    y = rows[BINOMIAL.target]
    predicted_class = (p >= threshold).astype(float)
    assert len(np.unique(p)) < len(p) / 5  # many tied probabilities: the AUC's tie handling is exercised

    assert list(metrics) == ["rows", "events", "accuracy", "baseline_accuracy", "precision", "recall", "auc",
                             "auc_low", "auc_high", "gini", "ks", "ks_score", "log_loss", "brier",
                             "calibration_intercept", "calibration_slope", "calibration", "gains"]
    assert metrics["rows"] == len(y)
    assert metrics["events"] == int(y.sum())
    expected = {  # scikit-learn's functions on the same held-out rows
        "accuracy": accuracy_score(y, predicted_class),
        "baseline_accuracy": accuracy_score(y, np.full_like(y, float(y.mean() >= 0.5))),
        "precision": precision_score(y, predicted_class),
        "recall": recall_score(y, predicted_class),
        "auc": roc_auc_score(y, p),
        "log_loss": log_loss(y, p),
        "brier": brier_score_loss(y, p),
    }
    for name, value in expected.items():
        assert metrics[name] == pytest.approx(value, rel=TOLERANCE, abs=TOLERANCE), name
    assert_calibration(metrics["calibration"], reference_calibration(rows, BINOMIAL, p))
    assert all(isinstance(metrics[name], int) for name in ("rows", "events"))
    assert all(type(metrics[name]) is float for name in expected)


@pytest.mark.parametrize("layout, family, coefficients, seed", TABLES[1:], ids=["poisson", "gaussian"])
def test_count_and_measurement_metrics_match_scikit_learn(engine, layout, family, coefficients, seed):
    metrics = holdout_metrics(engine, layout, family, coefficients, 0.5)
    rows, mu = reference_rows(layout, family, coefficients, seed)
    y = rows[layout.target]
    assert list(metrics) == ["rows", "deviance", "mean_absolute_error", "rmse", "mean_observed", "mean_predicted",
                             "calibration_intercept", "calibration_slope", "calibration"]
    assert metrics["rows"] == len(y)
    # Deviance summed over rows = scikit-learn's mean deviance times n (gaussian: the squared error).
    mean_deviance = mean_poisson_deviance(y, mu) if family == "poisson" else mean_squared_error(y, mu)
    expected = {
        "deviance": mean_deviance * len(y),
        "mean_absolute_error": mean_absolute_error(y, mu),
        "rmse": math.sqrt(mean_squared_error(y, mu)),
        "mean_observed": y.mean(),
        "mean_predicted": mu.mean(),
    }
    for name, value in expected.items():
        assert metrics[name] == pytest.approx(value, rel=TOLERANCE, abs=TOLERANCE), name
    assert_calibration(metrics["calibration"], reference_calibration(rows, layout, mu))


@pytest.mark.parametrize("engine", EMBEDDED, indirect=True)
def test_undefined_ratios_are_none(engine):
    # A threshold no probability reaches: no predicted events, so precision has no denominator.
    metrics = holdout_metrics(engine, BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 0.999)
    rows, _ = reference_rows(BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 11)
    assert metrics["precision"] is None
    assert metrics["recall"] == 0.0
    assert metrics["accuracy"] == pytest.approx(1 - rows[BINOMIAL.target].mean(), rel=TOLERANCE)


@pytest.mark.parametrize("engine", EMBEDDED, indirect=True)
def test_a_threshold_equal_to_the_probability_predicts_an_event(engine):
    # All coefficients 0: every probability is exactly 1 / (1 + EXP(0)) = 0.5, all tied.
    flat = {name: 0.0 for name in BINOMIAL_COEFFICIENTS}
    metrics = holdout_metrics(engine, BINOMIAL, "binomial", flat, 0.5)
    y = held_out(invented_table(BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 11), BINOMIAL)[BINOMIAL.target]
    assert metrics["recall"] == 1.0
    assert metrics["precision"] == pytest.approx(y.mean(), rel=TOLERANCE)
    assert metrics["auc"] == roc_auc_score(y, np.full_like(y, 0.5)) == 0.5  # scikit-learn: all tied
    assert metrics["log_loss"] == pytest.approx(math.log(2), rel=TOLERANCE)
    assert metrics["brier"] == 0.25


@pytest.mark.parametrize("engine", EMBEDDED, indirect=True)
def test_no_holdout_rows_give_only_the_row_count(engine):
    layout = DesignLayout("design_no_holdout", BINOMIAL.key, BINOMIAL.target, BINOMIAL.terms)
    assert holdout_metrics(engine, layout, "binomial", BINOMIAL_COEFFICIENTS, 0.5) == {"rows": 0}


def test_linear_predictor_writes_exact_literals_and_the_offset():
    coefficients = {INTERCEPT: 0.1, "engine_litres": -1e-300, "urban": 2.0 / 3.0}
    sql = linear_predictor(POISSON, coefficients).sql(dialect="duckdb", identify=True)
    assert sql == (
        'CAST(0.1 AS DOUBLE) + CAST(-1e-300 AS DOUBLE) * "engine_litres" '
        '+ CAST(0.6666666666666666 AS DOUBLE) * "urban" + "_offset"'
    )
    with pytest.raises(ValueError, match="missing \\['urban'\\]"):
        linear_predictor(POISSON, {INTERCEPT: 0.1, "engine_litres": 1.0})


def test_prediction_is_finite_for_extreme_linear_predictors(bare_engine):
    """EXP is clamped at +-700 (EXP(1000) is inf on DuckDB and an error on PostgreSQL, measured in tests/test_harden.py)."""
    eta = {"high": number(1000.0), "low": number(-1000.0), "mid": number(0.5)}
    query = exp.select(*(
        alias(prediction(family, value), f"{family}_{name}")
        for family in ("binomial", "poisson", "gaussian") for name, value in eta.items()
    ))
    (row,) = bare_engine.fetch(query)
    # Expected values from Python's math library.
    assert row == pytest.approx((
        1.0, 1 / (1 + math.exp(700)), 1 / (1 + math.exp(-0.5)),
        math.exp(700), math.exp(-700), math.exp(0.5),
        1000.0, -1000.0, 0.5,
    ), rel=TOLERANCE)


# --- the metrics a credit reviewer reads --------------------------------------------------------


def test_gini_and_ks_match_scikit_learn_and_scipy(engine):
    metrics = holdout_metrics(engine, BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 0.5)
    rows, p = reference_rows(BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 11)
    y = rows[BINOMIAL.target]
    # Gini is 2 AUC - 1 (common practice), with scikit-learn's AUC.
    assert metrics["gini"] == pytest.approx(2 * roc_auc_score(y, p) - 1, rel=TOLERANCE, abs=TOLERANCE)
    # KS: scipy's two-sample statistic on the two classes' predicted probabilities, and where it occurs.
    reference = ks_2samp(p[y == 1], p[y == 0])
    assert metrics["ks"] == pytest.approx(reference.statistic, rel=TOLERANCE, abs=TOLERANCE)
    assert metrics["ks_score"] == pytest.approx(reference.statistic_location, rel=TOLERANCE)
    assert 0.1 < metrics["ks"] < 1


def test_the_auc_interval_is_delongs_variance_written_from_the_paper(engine):
    metrics = holdout_metrics(engine, BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 0.5)
    rows, p = reference_rows(BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 11)
    (auc,), covariance = delong_reference(rows[BINOMIAL.target], [p])
    half = norm.ppf(0.975) * math.sqrt(covariance[0, 0])  # scipy's normal quantile
    assert metrics["auc"] == pytest.approx(auc, rel=TOLERANCE)
    assert metrics["auc_low"] == pytest.approx(auc - half, rel=1e-10)
    assert metrics["auc_high"] == pytest.approx(auc + half, rel=1e-10)


@pytest.mark.parametrize("engine", EMBEDDED, indirect=True)
def test_the_auc_interval_of_hanley_and_mcneils_ratings(engine, tmp_path):
    """The 109 CT images rated 1 (definitely normal) to 5 (definitely abnormal) of Hanley & McNeil
    (Radiology 1982, table 1; counts recalled from memory): 58 normal, 51 abnormal. Stata's `roctab`
    manual reports for them (recalled from memory) area 0.8932, DeLong standard error 0.0307 and
    asymptotic normal 95% interval 0.83295 to 0.95339; the numpy reference from the paper agrees."""
    normal, abnormal = [33, 6, 6, 11, 2], [3, 2, 2, 11, 33]
    rating = np.concatenate([np.repeat(np.arange(1.0, 6.0), normal), np.repeat(np.arange(1.0, 6.0), abnormal)])
    y = np.concatenate([np.zeros(sum(normal)), np.ones(sum(abnormal))])
    layout = DesignLayout("design_ratings", "image_id", "_target", ("rating",))
    path = tmp_path / "ratings.parquet"
    pq.write_table(pa.table({"image_id": np.arange(len(y)), "rating": rating, "_target": y,
                             "_holdout": np.ones(len(y), dtype=bool)}), path)
    engine.load_file(layout.table, path)
    metrics = holdout_metrics(engine, layout, "binomial", {INTERCEPT: -3.0, "rating": 1.0}, 0.5)
    assert metrics["rows"] == 109 and metrics["events"] == 51
    assert round(metrics["auc"], 4) == 0.8932
    assert round(metrics["auc_low"], 5) == 0.83295 and round(metrics["auc_high"], 5) == 0.95339
    (auc,), covariance = delong_reference(y, [rating])
    assert metrics["auc_high"] - metrics["auc"] == pytest.approx(norm.ppf(0.975) * math.sqrt(covariance[0, 0]), rel=1e-10)


TEMPORARY_TABLES = {  # the engines' own catalogs of tables, temporary ones included
    "postgres": "SELECT COUNT(*) FROM pg_tables WHERE tablename = '_featpipe_scored_holdout'",
    "duckdb": "SELECT COUNT(*) FROM duckdb_tables() WHERE table_name = '_featpipe_scored_holdout'",
}


@pytest.mark.parametrize("engine", ["postgres", "duckdb"], indirect=True)
def test_the_holdout_is_scored_once_for_every_metric_query(engine):
    """The scored holdout is stored in a temporary table the metric queries read, then dropped; the
    metrics are those of scoring per query. PostgreSQL computes a subquery again for every query that
    reads it; on DuckDB building and rendering the scoring expression into each query cost more than
    running them (a 25-term holdout of 300,000 rows: 1.4-2.0 s per query against 0.8-1.0 s stored)."""
    recording = Recording(engine)
    metrics = holdout_metrics(recording, BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 0.3)
    assert len(recording.queries) >= 8 and not any(f'"{BINOMIAL.table}"' in query for query in recording.queries)
    expected = scored_rows_metrics(engine, scored_holdout(BINOMIAL, BINOMIAL_COEFFICIENTS), "binomial", 0.3)
    # the same sums, over the rows in another order on DuckDB: equal to the last few bits
    assert metrics == {name: [pytest.approx(entry, rel=1e-13) for entry in value] if isinstance(value, list) else pytest.approx(value, rel=1e-13)
                       for name, value in expected.items()}
    assert engine.fetch(sqlglot.parse_one(TEMPORARY_TABLES[engine.dialect], read=engine.dialect)) == [(0,)]


@pytest.mark.parametrize("engine", ENGINE_KINDS, indirect=True)
def test_delongs_test_of_two_scores_on_the_same_rows_matches_numpy(engine, tmp_path):
    rng = np.random.default_rng(21)
    size = 400
    y = (rng.uniform(size=size) < 0.3).astype(float)
    first = np.round(y * 0.8 + rng.normal(0, 1, size), 1)  # rounded: ties within and across classes
    second = np.round(first * 0.5 + rng.normal(0, 1, size), 1)
    path = tmp_path / "two_scores.parquet"
    pq.write_table(pa.table({"_observed": y, "first_score": first, "second_score": second}), path)
    engine.load_file("two_scores", path)
    rows = exp.select("*").from_(exp.to_table("two_scores"))
    sums = read_rank_sums(engine.fetch(rank_components_query(rows, ["first_score", "second_score"])), 2)
    test = paired_test(sums)
    aucs, covariance = delong_reference(y, [first, second])
    assert test.auc == pytest.approx(tuple(aucs), rel=TOLERANCE)
    assert aucs[0] == pytest.approx(roc_auc_score(y, first), rel=TOLERANCE)  # scikit-learn
    std_error = math.sqrt(covariance[0, 0] + covariance[1, 1] - 2 * covariance[0, 1])
    assert test.std_error == pytest.approx(std_error, rel=1e-10)
    assert test.z == pytest.approx((aucs[0] - aucs[1]) / std_error, rel=1e-10)
    assert test.p_value == pytest.approx(2 * norm.sf(abs(test.z)), rel=1e-10)  # scipy's normal tail
    assert test.p_value < 0.05 and test.rows == size
    assert paired_test(read_rank_sums(engine.fetch(rank_components_query(rows, ["first_score", "first_score"])), 2)) is None


def test_the_gains_table_matches_numpy_deciles_from_the_top(engine):
    metrics = holdout_metrics(engine, BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 0.5)
    rows, p = reference_rows(BINOMIAL, "binomial", BINOMIAL_COEFFICIENTS, 11)
    y = rows[BINOMIAL.target]
    # numpy: sort by prediction then key, split as NTILE(10) does, and read the groups from the top.
    groups = list(reversed(np.array_split(np.lexsort((rows[BINOMIAL.key], p)), 10)))
    caught = np.cumsum([y[group].sum() for group in groups])
    assert [entry["decile"] for entry in metrics["gains"]] == list(range(1, 11))
    for entry, group, cumulative in zip(metrics["gains"], groups, caught, strict=True):
        assert (entry["rows"], entry["events"]) == (len(group), int(y[group].sum()))
        assert entry["event_rate"] == pytest.approx(y[group].mean(), rel=TOLERANCE)
        assert entry["cumulative_event_share"] == pytest.approx(cumulative / y.sum(), rel=TOLERANCE)
        assert entry["lift"] == pytest.approx(y[group].mean() / y.mean(), rel=TOLERANCE)
    assert metrics["gains"][-1]["cumulative_event_share"] == 1.0
    assert metrics["gains"][0]["lift"] > 1 > metrics["gains"][-1]["lift"]


@pytest.mark.parametrize("layout, family, coefficients, seed", TABLES, ids=["binomial", "poisson", "gaussian"])
def test_calibration_intercept_and_slope_match_statsmodels_recalibration(engine, layout, family, coefficients, seed):
    metrics = holdout_metrics(engine, layout, family, coefficients, 0.5)
    rows, _ = reference_rows(layout, family, coefficients, seed)
    y, eta = rows[layout.target], reference_eta(layout, coefficients, rows)
    reference_family = {"binomial": sm.families.Binomial(), "poisson": sm.families.Poisson(), "gaussian": sm.families.Gaussian()}[family]
    # statsmodels GLMs of the outcome on the linear predictor (Van Calster et al. 2019): eta as an offset
    # for the intercept, eta as the covariate for the slope.
    in_the_large = sm.GLM(y, np.ones(len(y)), family=reference_family, offset=eta).fit(tol=1e-14)
    with_slope = sm.GLM(y, sm.add_constant(eta), family=reference_family).fit(tol=1e-14)
    assert metrics["calibration_intercept"] == pytest.approx(in_the_large.params[0], rel=1e-9, abs=1e-11)
    assert metrics["calibration_slope"] == pytest.approx(with_slope.params[1], rel=1e-9)


@pytest.mark.parametrize("engine", EMBEDDED, indirect=True)
def test_a_perfectly_calibrated_model_has_intercept_0_and_slope_1(engine, tmp_path):
    """Rows whose event share in each group equals the predicted probability (built so here): the
    recalibration fits' score equations hold at a0 = 0 and (a, b) = (0, 1) exactly."""
    layout = DesignLayout("design_exact", "row_id", "_target", ("band",))
    bands, targets = [], []
    for band, events in ((-1.0, 1), (0.0, 2), (1.0, 3)):  # 4 rows per band; see the probabilities below
        bands += [band] * 4
        targets += [1.0] * events + [0.0] * (4 - events)
    # Probabilities 1/4, 1/2, 3/4 come from eta = ln(1/3), 0, ln(3), i.e. coefficient ln(3) on band.
    path = tmp_path / "exact.parquet"
    pq.write_table(pa.table({"row_id": np.arange(12), "band": bands, "_target": targets,
                             "_holdout": np.ones(12, dtype=bool)}), path)
    engine.load_file(layout.table, path)
    metrics = holdout_metrics(engine, layout, "binomial", {INTERCEPT: 0.0, "band": math.log(3)}, 0.5)
    assert metrics["calibration_intercept"] == pytest.approx(0.0, abs=1e-12)
    assert metrics["calibration_slope"] == pytest.approx(1.0, rel=1e-12)
    flat = holdout_metrics(engine, layout, "binomial", {INTERCEPT: 0.0, "band": 0.0}, 0.5)
    assert flat["calibration_slope"] is None  # every row has the same linear predictor: no slope to fit
    assert flat["calibration_intercept"] == pytest.approx(0.0, abs=1e-12)  # 6 events in 12 rows, predicted 1/2


def test_fit_stores_the_metrics_explain_shows_them_and_reading_checks_them(tmp_path):
    root = copy_demo("lease_default", tmp_path)
    assert run_featpipe("fit", "default_risk", "-p", str(root)).returncode == 0
    path = root / "fitted" / "default_risk.yaml"
    stored = yaml.safe_load(path.read_text(encoding="utf-8"))["metrics"]
    for key in ("auc_low", "auc_high", "gini", "ks", "ks_score", "calibration_intercept", "calibration_slope"):
        assert isinstance(stored[key], float), key
    assert stored["auc_low"] < stored["auc"] < stored["auc_high"] and stored["gini"] == pytest.approx(2 * stored["auc"] - 1)
    assert [entry["decile"] for entry in stored["gains"]] == list(range(1, 11))

    explained = run_featpipe("explain", "default_risk", "-p", str(root))
    assert explained.returncode == 0, explained.stderr
    assert f"gini {stored['gini']:.4g}" in explained.stdout and f"ks_score {stored['ks_score']:.4g}" in explained.stdout
    assert "gains by decile of the prediction" in explained.stdout
    top = stored["gains"][0]
    assert re.search(rf"│ +1 │ +{top['rows']} │ +{top['events']} │", explained.stdout)

    # A value of the new metrics edited into something else is refused on read, in one line.
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    data["metrics"]["gains"][0]["lift"] = "high"
    path.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
    refused = run_featpipe("explain", "default_risk", "-p", str(root))
    assert (refused.returncode, refused.stderr) == (
        1, "error: fitted/default_risk.yaml: metrics.gains[0].lift must be a finite number, not 'high'; run featpipe fit again\n")
    data["metrics"]["gains"][0]["lift"] = top["lift"]
    data["metrics"]["ks"] = float("nan")
    path.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
    refused = run_featpipe("explain", "default_risk", "-p", str(root))
    assert refused.returncode == 1 and "metrics.ks must be a finite number, not 'nan'" in refused.stderr
