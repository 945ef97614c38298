"""`featpipe drift`: the stability index computed by the drift query, on DuckDB, SQLite and PostgreSQL.

Two kinds of checks:

- small worked examples on a hand-written fitted file (one term `x`, bins x <= 1 and x > 1, each
  half of the training rows), whose PSI is worked by hand in the comments;
- the demo lease model (its committed fitted file) on batches written here: a fresh sample from the
  demo's own generator (a different seed: the training distribution), the demo leases with every
  payment doubled, the training rows themselves, and a table that lacks a contract column. Each PSI is
  checked against numpy on the same bins, with term values computed by pandas from the term files'
  definitions, independently of the generated SQL.
"""

from __future__ import annotations

import importlib.util
import math

import numpy as np
import pandas as pd
import pytest
from conftest import copy_demo
from sqlglot import exp
from sqlite_engine import SQLiteEngine

from featpipe.api import compute
from featpipe.compiler import compile_project
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.errors import FeatpipeError
from featpipe.fitted import INTERCEPT, FittedModel, FittedTerm, Profile, read_fitted
from featpipe.fitted.drift import (
    MAJOR,
    MODERATE,
    STABLE,
    drift,
    monitored,
    read_drift,
    reading,
    render_drift_sql,
)
from featpipe.fitted.scoring import scoring_model
from featpipe.project import load_project
from featpipe.sqlgen.common import column
from featpipe.sqlgen.drift import drift_query, output_names

MODEL = "default_risk"


# ---------------------------------------------------------------- worked examples, one term

def one_term_fit() -> FittedModel:
    """Model y ~ x with intercept 0 and slope 1, so the linear predictor is x and has x's profile.

    Training: 4 rows, no NULLs, x in [1, 2], mean 1.5; one edge at 1, so bin 1 is x <= 1 and bin 2
    is x > 1, each half of the training rows.
    """
    profile = Profile(count=4, nulls=0, mean=1.5, sd=0.5, min=1.0, max=2.0, median=1.5, edges=(1.0,), shares=(0.5, 0.5))
    terms = (
        FittedTerm(INTERCEPT, 0.0, None, None, None, None, None),
        FittedTerm("x", 1.0, None, None, None, None, None, fingerprint="0", sql='"x"', kind="numeric", profile=profile),
    )
    return FittedModel(
        model="toy", fingerprint="0", input="batch", key="id", target="y", family="gaussian", link="identity",
        offset=None, weights=None, holdout={}, threshold=0.5, penalty={}, columns={"id": "BIGINT", "x": "DOUBLE"},
        rows={}, fit={}, terms=terms,
        linear_predictor=profile,
    )


def run_on(engine, fitted: FittedModel, table: str):
    query = drift_query(scoring_model(fitted), monitored(fitted), table=table)
    (row,) = engine.fetch(query)
    return read_drift(fitted, table, output_names(query), row)


@pytest.fixture(params=["duckdb", "sqlite"])
def small_engine(request):
    engine = DuckDBEngine() if request.param == "duckdb" else SQLiteEngine()
    yield engine
    engine.close()


def load_values(engine, tmp_path, values: list[float | None]) -> str:
    path = tmp_path / "batch.csv"
    lines = ["id,x"] + [f"{i},{'' if v is None else v}" for i, v in enumerate(values, start=1)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    engine.load_file("batch", path)
    return "batch"


def test_psi_of_half_and_half_against_a_quarter_and_three_quarters(small_engine, tmp_path):
    # Worked by hand: expected (0.5, 0.5), actual (0.25, 0.75); both NULL bins are empty, so both
    # count as 0.0001 and add (0.0001 - 0.0001) * ln 1 = 0.
    #   (0.25 - 0.5) ln(0.25 / 0.5) = -0.25 * -0.693147 = 0.173287      (ln 2 = 0.693147)
    #   (0.75 - 0.5) ln(0.75 / 0.5) =  0.25 *  0.405465 = 0.101366      (ln 1.5 = ln 3 - ln 2)
    #   PSI = 0.274653, a major shift (above 0.25)
    report = run_on(small_engine, one_term_fit(), load_values(small_engine, tmp_path, [1.0, 2.0, 2.0, 2.0]))
    (term,) = report.terms
    for row in (term, report.score):
        assert row.psi == pytest.approx(0.274653, abs=5e-7)
        assert row.reading == MAJOR
        assert [b.actual for b in row.bins] == [0.25, 0.75]
        assert [b.expected for b in row.bins] == [0.5, 0.5]
        assert (row.null_share, row.below_min_share, row.above_max_share) == (0.0, 0.0, 0.0)
    # x's mean moved from 1.5 to 1.75; with slope 1 its mean contribution 1 * (x - 1.5) is 0.25.
    assert term.shift == pytest.approx(0.25, abs=1e-15)
    assert report.score.shift == pytest.approx(0.25, abs=1e-15)
    assert report.rows == 4


def test_an_empty_batch_bin_counts_as_a_share_of_0_0001(small_engine, tmp_path):
    # Worked by hand: actual (0, 1) is floored to (0.0001, 1) by the empty-bin rule.
    #   (0.0001 - 0.5) ln(0.0001 / 0.5) = -0.4999 * -8.517193 = 4.257745   (ln 5000 = 4 ln 10 - ln 2)
    #   (1 - 0.5) ln(1 / 0.5)           =  0.5 * 0.693147     = 0.346574
    #   PSI = 4.604318
    report = run_on(small_engine, one_term_fit(), load_values(small_engine, tmp_path, [2.0, 2.0, 2.0, 2.0]))
    assert report.terms[0].psi == pytest.approx(4.604318, abs=5e-7)


def test_nulls_are_a_bin_of_their_own_and_out_of_range_values_are_counted(small_engine, tmp_path):
    # Worked by hand: 5 rows, x = 0.5, 1, 2, 3, NULL: bin 1 (x <= 1) 0.4, bin 2 0.4, NULL 0.2, against
    # expected 0.5, 0.5 and an empty training NULL bin (0, so 0.0001).
    #   2 * (0.4 - 0.5) ln(0.4 / 0.5) = 2 * -0.1 * -0.223144 = 0.044629    (ln 0.8 = 3 ln 2 - ln 10)
    #   (0.2 - 0.0001) ln(0.2 / 0.0001) = 0.1999 * 7.600902  = 1.519420    (ln 2000 = ln 2 + 3 ln 10)
    #   PSI = 1.564049
    report = run_on(small_engine, one_term_fit(), load_values(small_engine, tmp_path, [0.5, 1.0, 2.0, 3.0, None]))
    term = report.terms[0]
    assert term.psi == pytest.approx(1.564049, abs=5e-7)
    assert (term.null_share, term.training_null_share) == (0.2, 0.0)
    assert (term.below_min_share, term.above_max_share) == (0.2, 0.2)  # 0.5 < min 1, 3 > max 2
    assert term.mean == pytest.approx(1.625)  # (0.5 + 1 + 2 + 3) / 4: NULLs are not averaged


def test_readings_use_the_credit_scoring_thresholds():
    # Common practice in credit scoring: below 0.1 stable, 0.1 to 0.25 moderate, above 0.25 major.
    assert [reading(v) for v in (0.0, 0.0999, 0.1, 0.25, 0.2501, 3.0)] == [STABLE, STABLE, MODERATE, MODERATE, MAJOR, MAJOR]


# ---------------------------------------------------------------- the demo lease model

def lease_terms(frame: pd.DataFrame) -> dict[str, np.ndarray]:
    """The default_risk terms by hand from the term files' definitions (NaN for SQL NULL)."""
    revenue = frame["monthly_revenue"]
    ratio = frame["monthly_payment"] / revenue.where(revenue != 0)  # payment / NULLIF(revenue, 0)
    young = (frame["firm_age_years"] < 2).astype(float)
    terms = {
        "payment_to_revenue": ratio,
        "young_firm": young,
        "young_and_stretched": ratio * young,
        "firm_age_years": frame["firm_age_years"],
        "log_revenue": np.log(revenue.where(revenue > 0)),
        "monthly_payment": frame["monthly_payment"],
        "past_late_payments": frame["past_late_payments"],
        "term_months": frame["term_months"],
    }
    return {name: np.asarray(values, dtype=float) for name, values in terms.items()}


def levels_psi(levels: pd.Series, learned: dict, train_rows: int) -> float:
    """PSI by hand of a LEVELS term: a bin per level with a column and the reference, one for the pooled
    levels (other), one for levels training never saw, NULL; expected shares are the fitted file's level
    counts over the fit's training rows; shares below 0.0001 count as 0.0001 (common practice)."""
    rows = {item["level"]: item["rows"] for item in learned["levels"]}
    named = [level for level in rows if level not in learned["pooled"]]
    groups = [[level] for level in named] + ([learned["pooled"]] if learned["pooled"] else [])
    actual = [levels.isin(group).sum() for group in groups]
    actual += [(levels.notna() & ~levels.isin(list(rows))).sum(), levels.isna().sum()]
    expected = [sum(rows[level] for level in group) for group in groups] + [0, train_rows - sum(rows.values())]
    actual, expected = np.maximum(np.array(actual) / len(levels), 1e-4), np.maximum(np.array(expected) / train_rows, 1e-4)
    return float(np.sum((actual - expected) * np.log(actual / expected)))


def levels_contribution(levels: pd.Series, learned: dict) -> np.ndarray:
    """A LEVELS term's part of the linear predictor: each column's estimate times its indicator. A level
    training never saw goes to `other` when the model has that column and is NaN (no prediction, as the
    scoring SQL gives it) otherwise; a NULL level is NaN (missing)."""
    has_other = any(item["label"] == "other" for item in learned["columns"])
    unseen = levels.notna() & ~levels.isin([item["level"] for item in learned["levels"]])
    pooled = levels.isin(learned["pooled"]) | (unseen if has_other else False)
    part = sum(item["estimate"] * (pooled if item["label"] == "other" else levels == item["label"]).to_numpy(float)
               for item in learned["columns"])
    return np.where(levels.isna() | (unseen & (not has_other)), np.nan, part)


def numpy_psi(values: np.ndarray, profile: Profile) -> float:
    """PSI by hand on the profile's bins: edges[i-1] < v <= edges[i] (searchsorted, side="left"), NULL a
    bin of its own, shares below 0.0001 counted as 0.0001 (common practice)."""
    present = values[~np.isnan(values)]
    counts = np.bincount(np.searchsorted(profile.edges, present, side="left"), minlength=len(profile.edges) + 1)
    actual = np.append(counts, np.isnan(values).sum()) / len(values)
    expected = np.append(np.asarray(profile.shares) * profile.count, profile.nulls) / (profile.count + profile.nulls)
    actual, expected = np.maximum(actual, 1e-4), np.maximum(expected, 1e-4)
    return float(np.sum((actual - expected) * np.log(actual / expected)))


def numpy_psis(frame: pd.DataFrame, fitted: FittedModel) -> dict[str, float]:
    terms = lease_terms(frame)
    linear = np.full(len(frame), fitted.terms[0].estimate)
    for term in fitted.terms[1:]:  # in model order, as the SQL adds them
        linear = linear + (levels_contribution(frame["sector"], term.learned) if term.learned
                           else term.estimate * terms[term.name])
    psis = {term.name: levels_psi(frame["sector"], term.learned, fitted.rows["train"]) if term.learned
            else numpy_psi(terms[term.name], term.profile) for term in fitted.terms[1:]}
    psis["linear_predictor"] = numpy_psi(linear, fitted.linear_predictor)
    return psis


def psis_of(report) -> dict[str, float]:
    return {row.name: row.psi for row in (*report.terms, report.score)}


def fresh_leases(root, seed: int) -> pd.DataFrame:
    """A new sample from the demo's own generator: the training distribution, other leases."""
    spec = importlib.util.spec_from_file_location("lease_generator", root / "generate.py")
    generator = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(generator)
    rows = generator.generate(np.random.default_rng(seed))
    frame = pd.DataFrame(rows, columns=list(pd.read_csv(root / "data" / "leases.csv", nrows=0).columns))
    return frame.replace("", None).astype({"monthly_revenue": float, "firm_age_years": float, "monthly_payment": float,
                                           "lease_id": int, "term_months": int, "past_late_payments": int})


@pytest.fixture(scope="module")
def lease(tmp_path_factory):
    """A copy of the demo project with its design tables built and these batches in its DuckDB file:
    fresh (another seed), doubled (every payment doubled), training (the fit's not-held-out rows) and
    no_revenue (the leases without their monthly_revenue column). Returns (root, frames by table)."""
    root = copy_demo("lease_default", tmp_path_factory.mktemp("drift"))
    project = load_project(root)
    compute(project, [MODEL])
    leases = pd.read_csv(root / "data" / "leases.csv")
    engine = DuckDBEngine(project.engine.path)
    try:
        layout = compile_project(project).models[MODEL].layout
        not_held_out = exp.select(column(layout.key)).from_(exp.to_table(layout.table)).where(exp.not_(column(layout.holdout)))
        training_keys = {key for (key,) in engine.fetch(not_held_out)}
        frames = {
            "fresh": fresh_leases(root, seed=7),
            "doubled": leases.assign(monthly_payment=leases["monthly_payment"] * 2),
            "training": leases[leases["lease_id"].isin(training_keys)],
            "no_revenue": leases.drop(columns=["monthly_revenue"]),
        }
        load_batches(engine, root, frames)
    finally:
        engine.close()
    return root, frames


def load_batches(engine, root, frames) -> None:
    """Each frame written to build/NAME.csv and loaded as table NAME: the batches drift is measured on."""
    for name, frame in frames.items():
        path = root / "build" / f"{name}.csv"
        frame.to_csv(path, index=False)
        engine.load_file(name, path)


@pytest.fixture(scope="module")
def reports(lease):
    root, _ = lease
    project = load_project(root)
    return {table: drift(project, MODEL, table) for table in ("fresh", "doubled", "training")}


@pytest.mark.parametrize("table", ["fresh", "doubled"])
def test_duckdb_psi_equals_numpy_on_the_same_bins(lease, reports, table):
    root, frames = lease
    expected = numpy_psis(frames[table], read_fitted(root / "fitted" / f"{MODEL}.yaml"))
    assert psis_of(reports[table]) == pytest.approx(expected, rel=1e-9, abs=1e-12)


def test_sqlite_runs_the_same_query_to_the_same_psi(lease, reports):
    root, frames = lease
    fitted = read_fitted(root / "fitted" / f"{MODEL}.yaml")
    engine = SQLiteEngine()
    try:
        engine.load_file("doubled", root / "build" / "doubled.csv")
        report = run_on(engine, fitted, "doubled")
    finally:
        engine.close()
    assert psis_of(report) == pytest.approx(numpy_psis(frames["doubled"], fitted), rel=1e-9, abs=1e-12)
    assert psis_of(report) == pytest.approx(psis_of(reports["doubled"]), rel=1e-12, abs=1e-15)


def test_postgres_runs_the_same_query_to_the_same_psi(lease, reports, postgres_engine):
    root, _ = lease
    fitted = read_fitted(root / "fitted" / f"{MODEL}.yaml")
    postgres_engine.load_file("doubled", root / "build" / "doubled.csv")
    report = run_on(postgres_engine, fitted, "doubled")
    assert psis_of(report) == pytest.approx(psis_of(reports["doubled"]), rel=1e-12, abs=1e-15)
    assert report.rows == reports["doubled"].rows


def test_a_batch_from_the_training_distribution_reads_stable(reports):
    report = reports["fresh"]
    assert report.rows == 5000
    assert report.score.reading == STABLE
    assert {row.name: row.reading for row in report.terms} == {row.name: STABLE for row in report.terms}
    assert report.exceeding(0.1) == ()


def test_doubled_payments_read_major_and_payment_to_revenue_moved_the_scores_most(reports):
    report = reports["doubled"]
    readings = {row.name: row.reading for row in report.terms}
    assert report.score.reading == MAJOR
    assert readings["payment_to_revenue"] == readings["monthly_payment"] == MAJOR
    assert readings["firm_age_years"] == readings["sector_level"] == STABLE  # untouched inputs
    # Terms come ranked by |mean contribution|: payment_to_revenue (coefficient 8.12) took the scores up.
    first = report.terms[0]
    assert (first.name, first.rank) == ("payment_to_revenue", 1)
    assert [row.rank for row in report.terms] == list(range(1, 10))
    assert first.shift > 0.5
    assert report.score.shift > 0.5  # the mean linear predictor rose with it
    by_name = {row.name: row for row in report.terms}
    assert by_name["monthly_payment"].above_max_share > 0  # doubled payments beyond the training maximum


def test_the_training_rows_themselves_show_no_drift(lease, reports):
    # The same rows the profiles were taken over fall into the same bins: every PSI is 0, and every
    # mean contribution is 0 because contributions are centred at the training means.
    # (The fitted file keeps training means at 12 significant digits, so a shift is 0 to about 1e-11.)
    # The exception is sector_level (LEVELS): its expected shares are its level counts over the fit's
    # training rows, which leave out the 58 rows with a NULL term that this batch holds; its PSI is
    # numpy's on the same bins, and tiny.
    report = reports["training"]
    root, frames = lease
    psis = psis_of(report)
    levels = psis.pop("sector_level")
    assert psis == {name: 0.0 for name in psis}
    assert levels == pytest.approx(numpy_psis(frames["training"], read_fitted(root / "fitted" / f"{MODEL}.yaml"))["sector_level"],
                                   rel=1e-9) and levels < 1e-4
    for row in report.terms:
        assert row.shift == pytest.approx(0.0, abs=1e-10)
        if row.name != "sector_level":
            assert [b.actual for b in row.bins] == pytest.approx([b.expected for b in row.bins], abs=1e-15)
            assert row.null_share == pytest.approx(row.training_null_share, abs=1e-15)
    assert report.score.shift == pytest.approx(0.0, abs=1e-10)


def test_fail_above_names_every_index_over_the_limit(reports):
    report = reports["doubled"]
    psi = psis_of(report)
    assert set(report.exceeding(0.25)) == {name for name, value in psi.items() if value > 0.25}
    assert {"payment_to_revenue", "monthly_payment", "linear_predictor"} <= set(report.exceeding(0.25))
    assert report.exceeding(psi["linear_predictor"]) == tuple(n for n in report.exceeding(0.0) if psi[n] > psi["linear_predictor"])
    assert report.exceeding(max(psi.values())) == ()  # "exceeds" is strictly above


def test_a_table_missing_a_contract_column_is_refused_by_name(lease):
    root, _ = lease
    with pytest.raises(FeatpipeError) as refused:
        drift(load_project(root), MODEL, "no_revenue")
    message = str(refused.value)
    assert "column 'monthly_revenue' (DOUBLE) is missing from table 'no_revenue'" in message
    assert "featpipe.yaml" in message


def test_a_stale_model_is_refused_unless_allowed(tmp_path):
    root = copy_demo("lease_default", tmp_path)
    terms = root / "terms" / "affordability.sql"
    terms.write_text(terms.read_text().replace("firm_age_years < 2", "firm_age_years < 3"), encoding="utf-8")
    with pytest.raises(FeatpipeError, match=r"default_risk.yaml is stale: term 'young_firm' changed meaning.*--allow-stale"):
        drift(load_project(root), MODEL, "leases")


def test_the_exported_sql_returns_the_psi_on_the_warehouse(lease, reports):
    root, _ = lease
    project = load_project(root)
    text = render_drift_sql(project, MODEL, "doubled", "sqlite")
    assert text.startswith("-- featpipe drift query for model 'default_risk'")
    engine = SQLiteEngine()
    try:
        engine.load_file("doubled", root / "build" / "doubled.csv")
        cursor = engine.connection.execute(text)  # the printed text itself, header comment included
        row = dict(zip([d[0] for d in cursor.description], cursor.fetchone()))
    finally:
        engine.close()
    report = reports["doubled"]
    for drifted in (*report.terms, report.score):
        assert row[f"{drifted.name}__psi"] == pytest.approx(drifted.psi, rel=1e-12)
    assert row["rows"] == report.rows


def test_json_shape(reports):
    shape = reports["doubled"].as_dict()
    assert list(shape) == ["model", "table", "rows", "stale", "rules", "score", "terms", "inputs"]
    assert shape["rules"]["empty_share"] == 0.0001
    assert shape["score"]["name"] == "linear_predictor"
    first = shape["terms"][0]
    assert list(first) == ["name", "psi", "reading", "reasons", "rank", "shift", "outside_share", "mean", "training_mean", "null_share",
                           "training_null_share", "below_min_share", "above_max_share", "bins"]
    assert list(first["bins"][0]) == ["low", "high", "expected", "actual", "rows"]
    assert first["bins"][0]["low"] is None and first["bins"][-1]["high"] is None
    assert sum(b["rows"] for b in first["bins"]) + round(first["null_share"] * shape["rows"]) == shape["rows"]
    assert math.isclose(sum(b["expected"] for b in first["bins"]) + first["training_null_share"], 1.0)
