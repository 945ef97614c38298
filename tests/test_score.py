"""The scoring query on real engines (DuckDB, SQLite, PostgreSQL), against numpy and statsmodels.

Every fitted model here is written by hand in Python with known coefficients and training means, so
the expected values are plain arithmetic on the same numbers (numpy), or statsmodels' own `predict`
for a GLM it fitted (statsmodels is the reference library). Precision: 1e-12 relative; the SQL and the numpy reference use the same order of operations, so most values agree to the bit.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlglot
import statsmodels.api as sm
from sqlite_engine import SQLiteEngine

from featpipe.compiler.canonical import fingerprint_of_sql
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.errors import FeatpipeError
from featpipe.fitted import INTERCEPT, FittedModel, FittedTerm, Profile
from featpipe.fitted.scoring import render_score, scoring_model
from featpipe.sqlgen.common import render
from featpipe.sqlgen.score import baseline, score_query, score_statement

ENGINES = ["duckdb", "sqlite", "postgres"]
# Spark starts slowly, so it runs the one test that checks every output column.
PARITY_CASES = [(engine, reasons) for engine in ENGINES for reasons in (0, 3)]
PARITY_CASES.append(pytest.param("spark", 3, marks=pytest.mark.spark))
RTOL = 1e-12
LINK = {"binomial": "logit", "poisson": "log", "gaussian": "identity"}
ETA_LIMIT = 700.0  # the clamp of the inverse link (featpipe.sqlgen.metrics.ETA_LIMIT)


# --- fitted models written by hand -------------------------------------------------------------


def fitted_term(name: str, estimate: float, sql: str, mean: float, kind: str = "numeric") -> FittedTerm:
    profile = Profile(count=100, nulls=0, mean=mean, sd=1.0, min=0.0, max=1.0, median=0.5, edges=(), shares=())
    return FittedTerm(name, estimate, None, None, None, None, None, fingerprint=fingerprint_of_sql(sql), sql=sql,
                      kind=kind, profile=profile)


# The declared types of the invented orders table (see write_orders); a fitted file records them.
ORDER_COLUMNS = {"order_id": "BIGINT", "amount": "DOUBLE", "items": "BIGINT", "region": "VARCHAR",
                 "exposure": "DOUBLE", "age": "DOUBLE"}


def fitted_model(terms, intercept: float, family: str = "binomial", offset: str | None = None,
                 key: str = "order_id", input: str = "orders", model: str = "returns",
                 fingerprint: str = "0123456789abcdef") -> FittedModel:
    intercept_term = FittedTerm(INTERCEPT, intercept, None, None, None, None, None)
    return FittedModel(
        model=model, fingerprint=fingerprint, input=input, key=key, target="returned", family=family,
        link=LINK[family], offset=offset, weights=None, holdout={"fraction": 0.3, "salt": "v1"}, threshold=0.5,
        penalty={"l2": 0.0, "l1": 0.0}, columns=ORDER_COLUMNS, rows={}, fit={}, terms=(intercept_term, *terms),
    )


def _nan(values) -> np.ndarray:
    return np.array([math.nan if value is None else value for value in values], dtype=float)


# Each term: name, canonical SQL as a fitted file stores it, kind, and the same value in numpy.
ORDER_TERMS = [
    ("item_price", '"amount" / NULLIF("items", 0)', "numeric",
     lambda d: np.where(d["items"] != 0, d["amount"] / np.where(d["items"] != 0, d["items"], 1.0), math.nan)),
    ("northern", "CASE WHEN \"region\" = 'north' THEN 1 ELSE 0 END", "numeric",
     lambda d: np.array([1.0 if region == "north" else 0.0 for region in d["region"]])),
    ("log_amount", 'LN(CASE WHEN "amount" > 0 THEN "amount" END)', "numeric",
     lambda d: np.log(np.where(d["amount"] > 0, d["amount"], math.nan))),
    ("big_basket", '"items" >= 3', "boolean",
     lambda d: np.where(np.isnan(d["items"]), math.nan, (d["items"] >= 3).astype(float))),
    ("items", '"items"', "numeric", lambda d: d["items"]),
    ("north_price", "(\"amount\" / NULLIF(\"items\", 0)) * (CASE WHEN \"region\" = 'north' THEN 1 ELSE 0 END)", "numeric",
     lambda d: ORDER_TERMS[0][3](d) * ORDER_TERMS[1][3](d)),
    ("root_items", 'SQRT("items" + 1)', "numeric", lambda d: np.sqrt(d["items"] + 1)),
]
COEFFICIENTS = [-1.2, 0.013, 0.45, -0.21, 0.3, 0.05, -0.004, 0.17]  # intercept first; invented


def orders_data(rows: int = 300, seed: int = 7) -> dict:
    """Invented orders with NULLs, zero and negative amounts, zero item counts and an unseen region."""
    rng = np.random.default_rng(seed)
    amount = np.round(rng.normal(80, 45, rows), 2)
    amount[rng.random(rows) < 0.05] = math.nan
    amount[:3] = [0.0, -12.5, 1e-3]
    items = rng.integers(0, 7, rows).astype(float)
    items[rng.random(rows) < 0.03] = math.nan
    region = list(rng.choice(["north", "south", "east", "west"], rows))
    region[3], region[4] = "arctic", None  # a region the training never saw, and a missing one
    return {"order_id": np.arange(1, rows + 1), "amount": amount, "items": items, "region": region,
            "returned": rng.integers(0, 2, rows)}


def write_orders(path, data: dict) -> None:
    table = pa.table({
        "order_id": pa.array(data["order_id"], pa.int64()),
        "amount": pa.array([None if math.isnan(v) else v for v in data["amount"]], pa.float64()),
        "items": pa.array([None if math.isnan(v) else int(v) for v in data["items"]], pa.int64()),
        "region": pa.array(data["region"], pa.string()),
        "returned": pa.array(data["returned"], pa.int64()),
        **({"exposure": pa.array(data["exposure"], pa.float64())} if "exposure" in data else {}),
    })
    pq.write_table(table, path)


def orders_model(family: str = "binomial") -> FittedModel:
    data = orders_data()
    terms = []
    for (name, sql, kind, value), estimate in zip(ORDER_TERMS, COEFFICIENTS[1:]):
        terms.append(fitted_term(name, estimate, sql, float(np.nanmean(value(data))), kind))
    return fitted_model(terms, COEFFICIENTS[0], family)


# --- the same rules in numpy ---------------------------------------------------------------------


def expected_scores(fitted: FittedModel, values: list[np.ndarray], reasons: int = 0, offset=None) -> dict:
    """Prediction, linear predictor, contributions, status and reasons as the docs define them.

    A learned term's value may be the matrix of its design columns (rows x columns): it then counts as
    one term of value X b (its columns times their estimates), coefficient 1 and training mean m' b.
    """
    intercept, *terms = fitted.terms
    rows = len(values[0])
    combined = []  # (coefficient, value, training mean) per term
    for term, value in zip(terms, values):
        if np.ndim(value) == 2:
            b = np.array([item["estimate"] for item in term.learned["columns"]])
            m = np.array([item["mean"] for item in term.learned["columns"]])
            combined.append((1.0, value @ b, float(m @ b)))
        else:
            combined.append((term.estimate, value, term.profile.mean))
    values = [value for _, value, _ in combined]
    eta = np.full(rows, intercept.estimate)
    for estimate, value, _ in combined:
        eta = eta + estimate * value
    if offset is not None:
        eta = eta + offset
    clamped = np.clip(eta, -ETA_LIMIT, ETA_LIMIT)
    prediction = {"binomial": lambda: 1.0 / (1.0 + np.exp(-clamped)), "poisson": lambda: np.exp(clamped),
                  "gamma": lambda: np.exp(clamped), "gaussian": lambda: eta}[fitted.family]()
    missing = [np.isnan(value) for value in values] + ([np.isnan(offset)] if offset is not None else [])
    names = [term.name for term in terms] + (["offset"] if offset is not None else [])
    status = []
    for row in range(rows):
        first = next((name for name, gaps in zip(names, missing) if gaps[row]), None)
        status.append("ok" if first is None else f"missing: {first}")
    ok = np.array([s == "ok" for s in status])
    contributions = [np.where(ok, estimate * (value - mean), math.nan) for estimate, value, mean in combined]
    reason_rows = []
    for row in range(rows):
        pushing = sorted((-c[row], index) for index, c in enumerate(contributions) if ok[row] and c[row] > 0)
        chosen = [terms[index].name for _, index in pushing[:reasons]]
        reason_rows.append(chosen + [None] * (reasons - len(chosen)))
    return {"prediction": np.where(ok, prediction, math.nan), "linear_predictor": np.where(ok, eta, math.nan),
            "contributions": contributions, "status": status, "reasons": reason_rows}


def scored(engine, fitted: FittedModel, reasons: int = 0, table: str | None = None) -> dict:
    """Run the scoring query and split its rows (ordered by key) into named columns."""
    query = score_query(scoring_model(fitted), table=table, reasons=reasons)
    names = [projection.alias_or_name for projection in query.expressions]
    rows = sorted(engine.fetch(query), key=lambda row: row[0])
    columns = {name: [row[i] for row in rows] for i, name in enumerate(names)}
    terms = [term.name for term in fitted.terms[1:]]
    return {
        "names": names,
        "key": columns[names[0]],
        "prediction": _nan(columns["prediction"]),
        "linear_predictor": _nan(columns["linear_predictor"]),
        "offset": _nan(columns["offset"]) if "offset" in columns else None,
        "contributions": [_nan(columns[f"contribution_{name}"]) for name in terms],
        "status": columns["status"],
        "reasons": [[columns[f"reason_{k}"][row] for k in range(1, reasons + 1)] for row in range(len(rows))],
    }


def assert_same_scores(actual: dict, expected: dict) -> None:
    np.testing.assert_allclose(actual["prediction"], expected["prediction"], rtol=RTOL, atol=0)
    # A learned term adds several columns, in another order here than in SQL: near 0, a sum keeps an
    # absolute error of a few units in the last place of its parts, so the relative error can grow.
    np.testing.assert_allclose(actual["linear_predictor"], expected["linear_predictor"], rtol=RTOL, atol=1e-14)
    for got, want in zip(actual["contributions"], expected["contributions"], strict=True):
        np.testing.assert_allclose(got, want, rtol=RTOL, atol=1e-14)
    assert actual["status"] == expected["status"]
    assert actual["reasons"] == expected["reasons"]


# --- engines --------------------------------------------------------------------------------------


@pytest.fixture(params=ENGINES)
def engine(request, tmp_path):
    """DuckDB and SQLite (Python's sqlite3) in memory; PostgreSQL and Spark from tests/fixtures_engines.py."""
    if request.param == "duckdb":
        engine = DuckDBEngine(None)
    elif request.param == "sqlite":
        engine = SQLiteEngine(None)  # registers LN/EXP/SQRT/POWER/LOG10 fallbacks only if the build lacks them
    else:
        yield request.getfixturevalue(f"{request.param}_engine")  # skipped locally when absent, fails in CI
        return
    yield engine
    engine.close()


def load(engine, tmp_path, data: dict, name: str = "orders") -> None:
    path = tmp_path / f"{name}.parquet"
    write_orders(path, data)
    engine.load_file(name, path)


def python_values(data: dict) -> list[np.ndarray]:
    return [value(data) for _, _, _, value in ORDER_TERMS]


# --- tests ---------------------------------------------------------------------------------------


def test_output_columns_are_key_prediction_linear_predictor_contributions_status_reasons():
    query = score_query(scoring_model(orders_model()), reasons=2)
    assert [p.alias_or_name for p in query.expressions] == [
        "order_id", "prediction", "linear_predictor",
        *(f"contribution_{name}" for name, *_ in ORDER_TERMS),
        "status", "reason_1", "reason_2",
    ]
    with_offset = score_query(scoring_model(
        fitted_model([fitted_term("age", 0.1, '"age"', 3.0)], -2.0, "poisson", offset='LN("exposure")')))
    assert [p.alias_or_name for p in with_offset.expressions] == [
        "order_id", "prediction", "linear_predictor", "offset", "contribution_age", "status"]


@pytest.mark.parametrize(("engine", "reasons"), PARITY_CASES, indirect=["engine"])
def test_scores_equal_numpy_on_every_engine_and_duckdb_row_by_row(engine, tmp_path, reasons):
    data = orders_data()
    fitted = orders_model()
    load(engine, tmp_path, data)
    actual = scored(engine, fitted, reasons)
    assert actual["key"] == list(range(1, 301))
    expected = expected_scores(fitted, python_values(data), reasons)
    assert_same_scores(actual, expected)
    assert 0 < expected["status"].count("ok") < 300  # the data has both complete and incomplete rows
    if engine.name != "duckdb":
        reference = DuckDBEngine(None)
        load(reference, tmp_path, data)
        on_duckdb = scored(reference, fitted, reasons)
        reference.close()
        assert_same_scores(actual, on_duckdb)


def test_contributions_add_up_to_the_linear_predictor(tmp_path):
    """linear_predictor = baseline + offset + SUM(contributions), baseline = the linear predictor at the means."""
    engine = DuckDBEngine(None)
    data = orders_data()
    load(engine, tmp_path, data)
    fitted = orders_model()
    actual = scored(engine, fitted)
    total = baseline(scoring_model(fitted)) + np.sum(actual["contributions"], axis=0)
    np.testing.assert_allclose(total, actual["linear_predictor"], rtol=RTOL, atol=1e-13)
    assert baseline(scoring_model(fitted)) == pytest.approx(COEFFICIENTS[0] + sum(
        b * t.profile.mean for b, t in zip(COEFFICIENTS[1:], fitted.terms[1:])), rel=1e-15)


def test_reason_codes_rank_positive_contributions_and_break_ties_by_model_order(engine, tmp_path):
    # Contributions by hand: flag_a = 1.0 * (x - 0), flag_b = 1.0 * (y - 0), flag_c = 2.0 * (z - 0.5).
    fitted = fitted_model([
        fitted_term("flag_a", 1.0, '"amount"', 0.0),
        fitted_term("flag_b", 1.0, '"items"', 0.0),
        fitted_term("flag_c", 2.0, '"returned"', 0.5),
    ], 0.0, "gaussian")
    data = {"order_id": np.array([1, 2, 3, 4]), "amount": np.array([3.0, 2.0, -1.0, 0.0]),
            "items": np.array([1.0, 2.0, -2.0, 0.0]), "region": ["north"] * 4, "returned": np.array([1, 1, 0, 0])}
    load(engine, tmp_path, data)
    actual = scored(engine, fitted, reasons=3)
    assert actual["reasons"] == [
        ["flag_a", "flag_b", "flag_c"],  # 3 > 1 = 1: flag_b and flag_c tie at 1, flag_b comes first in the model
        ["flag_a", "flag_b", "flag_c"],  # 2 = 2 > 1: the tie between flag_a and flag_b goes to flag_a
        [None, None, None],  # nothing pushes up: -1, -2, -1
        [None, None, None],  # zero contributions do not push up either
    ]
    assert actual["linear_predictor"].tolist() == [6.0, 6.0, -3.0, 0.0]


def test_null_term_gives_null_scores_and_names_the_first_missing_term(engine, tmp_path):
    fitted = orders_model()
    data = {"order_id": np.array([1, 2, 3, 4]), "amount": np.array([50.0, math.nan, 50.0, -5.0]),
            "items": np.array([0.0, 2.0, 2.0, math.nan]), "region": ["north", "south", "east", "west"],
            "returned": np.array([0, 1, 0, 1])}
    load(engine, tmp_path, data)
    actual = scored(engine, fitted, reasons=2)
    assert actual["status"] == [
        "missing: item_price",  # zero divisor
        "missing: item_price",  # missing amount: item_price is the first term of the model that reads it
        "ok",
        "missing: item_price",  # missing item count; big_basket and items are NULL too, but come later
    ]
    for row in (0, 1, 3):
        assert math.isnan(actual["prediction"][row]) and math.isnan(actual["linear_predictor"][row])
        assert all(math.isnan(c[row]) for c in actual["contributions"])
        assert actual["reasons"][row] == [None, None]
    assert not math.isnan(actual["prediction"][2])


def test_status_names_a_later_term_and_the_offset(engine, tmp_path):
    fitted = fitted_model([fitted_term("item_price", 0.1, '"amount" / NULLIF("items", 0)', 10.0),
                           fitted_term("log_amount", 0.2, 'LN("amount")', 3.0)], -1.0, "poisson",
                          offset='LN("returned")')
    data = {"order_id": np.array([1, 2, 3]), "amount": np.array([-4.0, 8.0, 8.0]), "items": np.array([2.0, 2.0, 2.0]),
            "region": ["north"] * 3, "returned": np.array([1, 0, 2])}
    load(engine, tmp_path, data)
    actual = scored(engine, fitted)
    assert actual["status"] == ["missing: log_amount", "missing: offset", "ok"]
    expected = math.exp(-1.0 + 0.1 * 4.0 + 0.2 * math.log(8.0) + math.log(2.0))
    assert actual["prediction"][2] == pytest.approx(expected, rel=RTOL)
    assert actual["offset"][2] == pytest.approx(math.log(2.0), rel=RTOL)
    assert math.isnan(actual["prediction"][0]) and math.isnan(actual["prediction"][1])


@pytest.mark.parametrize("family", ["binomial", "poisson"])
def test_huge_linear_predictor_saturates_instead_of_overflowing(engine, tmp_path, family):
    fitted = fitted_model([fitted_term("item_price", 1.0, '"amount" / NULLIF("items", 0)', 0.0)], 0.0, family)
    data = {"order_id": np.array([1, 2, 3, 4]), "amount": np.array([1e300, -1e300, 800.0, -800.0]),
            "items": np.array([1.0, 1.0, 1.0, 1.0]), "region": ["north"] * 4, "returned": np.array([0, 0, 0, 0])}
    load(engine, tmp_path, data)
    prediction = scored(engine, fitted)["prediction"]
    if family == "binomial":  # 1 / (1 + EXP(-700)) is 1.0 in doubles; 1 / (1 + EXP(700)) is below 1e-304
        assert prediction[0] == 1.0 and prediction[2] == 1.0
        assert 0.0 <= prediction[1] < 1e-300 and 0.0 <= prediction[3] < 1e-300
    else:
        assert prediction[0] == pytest.approx(math.exp(700.0), rel=RTOL) and prediction[2] == prediction[0]
        assert 0.0 < prediction[1] < 1e-300 and prediction[3] == prediction[1]


def test_unseen_category_scores_as_the_reference_level(tmp_path):
    """The documented rule: an indicator of a category gives 0 for a value the training never saw."""
    engine = DuckDBEngine(None)
    fitted = orders_model()
    data = {"order_id": np.array([1, 2]), "amount": np.array([40.0, 40.0]), "items": np.array([2.0, 2.0]),
            "region": ["arctic", "south"], "returned": np.array([0, 0])}
    load(engine, tmp_path, data)
    actual = scored(engine, fitted)
    assert actual["status"] == ["ok", "ok"]
    assert actual["prediction"][0] == actual["prediction"][1]


SM_FAMILIES = {"binomial": sm.families.Binomial(), "poisson": sm.families.Poisson(), "gaussian": sm.families.Gaussian()}


@pytest.mark.parametrize("family", ["binomial", "poisson", "gaussian"])
def test_prediction_equals_statsmodels_predict(engine, tmp_path, family):
    """statsmodels fits the GLM on a design computed in numpy; the SQL must reproduce `results.predict`."""
    rng = np.random.default_rng(11)
    rows = 400
    data = orders_data(rows, seed=11)
    data["amount"] = np.round(rng.uniform(5, 200, rows), 2)
    data["items"] = rng.integers(1, 7, rows).astype(float)
    exposure = np.round(rng.uniform(0.1, 1.0, rows), 3)
    chosen = ORDER_TERMS[:5]
    design = np.column_stack([value(data) for _, _, _, value in chosen])
    eta = -2.0 + design @ np.array([0.01, 0.5, 0.2, -0.3, 0.1])
    offset = np.log(exposure) if family == "poisson" else None
    if family == "binomial":
        target = rng.random(rows) < 1 / (1 + np.exp(-eta))
    elif family == "poisson":
        target = rng.poisson(np.exp(eta + offset))
    else:
        target = eta + rng.normal(0, 1, rows)
    results = sm.GLM(target.astype(float), sm.add_constant(design), family=SM_FAMILIES[family], offset=offset).fit()
    terms = [fitted_term(name, float(b), sql, float(design[:, i].mean()), kind)
             for i, ((name, sql, kind, _), b) in enumerate(zip(chosen, results.params[1:]))]
    fitted = fitted_model(terms, float(results.params[0]), family, offset='LN("exposure")' if offset is not None else None)
    load(engine, tmp_path, {**data, "exposure": exposure})
    actual = scored(engine, fitted)
    assert set(actual["status"]) == {"ok"}
    expected = results.predict(sm.add_constant(design), offset=offset)
    np.testing.assert_allclose(actual["prediction"], expected, rtol=RTOL, atol=0)


@pytest.mark.parametrize("dialect", ["spark", "snowflake", "bigquery", "postgres", "duckdb", "sqlite"])
@pytest.mark.parametrize("wrapper", [{}, {"as_view": "scores_view"}, {"into": "scores"}])
def test_renderings_parse_back_to_the_same_tree(dialect, wrapper):
    fitted = fitted_model([*orders_model().terms[1:]], -1.2, "poisson", offset='LN("returned")')
    statement = score_statement(scoring_model(fitted), reasons=3, **wrapper)
    text = render(statement, dialect)
    again = sqlglot.parse_one(text, read=dialect)
    assert render(again, dialect) == text
    assert again == sqlglot.parse_one(render(again, dialect), read=dialect)


def test_header_names_the_model_every_fingerprint_and_the_file_hash():
    fitted = orders_model()
    text = render_score(score_query(scoring_model(fitted)), fitted, "feedc0ffee123456", "postgres")
    header = text[: text.index("WITH")]
    assert all(line.startswith("-- ") for line in header.splitlines())
    assert "model 'returns'" in header and "feedc0ffee123456" in header and fitted.fingerprint in header
    for term in fitted.terms[1:]:
        assert f"{term.name}: {term.fingerprint}" in header
    assert f"{baseline(scoring_model(fitted))!r}" in header
    statements = sqlglot.parse(text, read="postgres")
    assert len(statements) == 1 and statements[0] is not None


def test_view_and_table_wrappers_run(tmp_path):
    engine = DuckDBEngine(None)
    load(engine, tmp_path, orders_data())
    model = scoring_model(orders_model())
    engine.execute(score_statement(model, reasons=1, as_view="scores_view"))
    engine.execute(score_statement(model, reasons=1, into="scores_table"))
    plain = sorted(engine.fetch(score_query(model, reasons=1)), key=lambda row: row[0])
    for name in ("scores_view", "scores_table"):
        rows = engine.fetch(sqlglot.parse_one(f"SELECT * FROM {name} ORDER BY order_id"))
        assert [tuple(r) for r in rows] == [tuple(r) for r in plain]


def test_scoring_another_table_name():
    query = score_query(scoring_model(orders_model()), table="analytics.new_orders")
    assert 'FROM "analytics"."new_orders"' in render(query, "duckdb")


def test_a_hand_edited_fitted_term_is_checked_against_the_allow_list():
    fitted = fitted_model([fitted_term("noisy", 1.0, '"amount" * RANDOM()', 0.0)], 0.0)
    with pytest.raises(FeatpipeError, match=r"fitted/returns.yaml: term 'noisy': RANDOM\(\) is not deterministic"):
        score_query(scoring_model(fitted))


def test_reasons_beyond_the_number_of_terms_are_refused():
    with pytest.raises(FeatpipeError, match="--reasons must be between 0 and 7, the number of terms in fitted/returns.yaml"):
        score_query(scoring_model(orders_model()), reasons=8)
    with pytest.raises(FeatpipeError, match="not both"):
        score_statement(scoring_model(orders_model()), as_view="a", into="b")


def renamed(fitted: FittedModel, index: int, name: str) -> FittedModel:
    terms = list(fitted.terms)
    terms[index] = replace(terms[index], name=name)
    return replace(fitted, terms=tuple(terms))


@pytest.mark.parametrize(("edit", "message"), [
    (lambda f: renamed(f, 1, "status"),
     "fitted/returns.yaml: term name 'status' is a column the scoring query writes; rename the term and run `featpipe fit` again"),
    (lambda f: renamed(f, 2, "rows"),
     "fitted/returns.yaml: term name 'rows' is a column the drift query writes; rename the term and run `featpipe fit` again"),
    (lambda f: replace(f, key="Prediction"),
     "fitted/returns.yaml: key column 'Prediction' is a column the scoring query writes; key the input by another column"),
    (lambda f: renamed(f, 2, "item_price"), "fitted/returns.yaml: 'item_price' names two columns of the model; run `featpipe fit` again"),
    (lambda f: replace(f, terms=f.terms[1:]), "fitted/returns.yaml: the first term must be '(intercept)'; run `featpipe fit` again"),
    (lambda f: replace(f, terms=(f.terms[0], replace(f.terms[1], profile=None))),
     "fitted/returns.yaml: term 'item_price' has no training profile; run `featpipe fit` again"),
])
def test_a_hand_edited_fitted_file_is_checked_before_any_sql_is_built(edit, message):
    """A fitted file is reviewed as a diff and may be edited by hand: its names become output columns."""
    with pytest.raises(FeatpipeError) as refused:
        scoring_model(edit(orders_model()))
    assert str(refused.value) == message
