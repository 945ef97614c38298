"""`featpipe score` through the API on a real project: contract and staleness checks, atomic output.

The project is the small shop project of conftest.py; its fitted file is written here by hand from the
compiled model (known coefficients and means), since fitting is not what these tests are about.
Expected counts come from the eight rows of conftest.ORDERS_CSV.
"""

from __future__ import annotations

import math

import pytest
import sqlglot
from conftest import write_project

from featpipe.compiler import compile_project
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.errors import FeatpipeError
from featpipe.fitted import INTERCEPT, FittedModel, FittedTerm, Profile, write_fitted
from featpipe.fitted.scoring import render_score_sql, score
from featpipe.project import load_project

# Invented coefficients and training means of the shop model 'returns' (terms item_price, northern, items).
ESTIMATES = {INTERCEPT: -0.5, "item_price": 0.01, "northern": -0.8, "items": 0.25}
MEANS = {"item_price": 30.0, "northern": 0.5, "items": 2.5}


def write_shop_fit(root) -> FittedModel:
    project = load_project(root)
    model = compile_project(project).models["returns"]
    terms = [FittedTerm(INTERCEPT, ESTIMATES[INTERCEPT], None, None, None, None, None)]
    for term in model.terms:
        profile = Profile(6, 0, MEANS[term.name], 1.0, 0.0, 1.0, 0.5, (), ())
        terms.append(FittedTerm(term.name, ESTIMATES[term.name], None, None, None, None, None,
                                fingerprint=term.fingerprint, sql=term.sql, kind=term.kind, profile=profile))
    fitted = FittedModel(
        model="returns", fingerprint=model.fingerprint, input="orders", key="order_id", target="returned",
        family="binomial", link="logit", offset=None, weights=None, holdout={"fraction": 0.3, "salt": "v1"},
        threshold=0.5, penalty={"l2": 0.0, "l1": 0.0}, rows={}, fit={}, terms=tuple(terms),
        columns={"order_id": "BIGINT", "amount": "DOUBLE", "items": "BIGINT", "region": "VARCHAR"},
        depends_on=model.dependencies,
    )
    write_fitted(project.fitted_path("returns"), fitted)
    return fitted


def database(root) -> DuckDBEngine:
    return DuckDBEngine(load_project(root).engine.path)


@pytest.fixture
def shop(tmp_path):
    """The shop project with its orders loaded into its DuckDB file and a current fitted file."""
    root = write_project(tmp_path / "shop")
    write_shop_fit(root)
    engine = database(root)
    engine.load_file("orders", root / "data" / "orders.csv")
    engine.close()
    return root


def rows_of(root, sql: str) -> list[tuple]:
    engine = database(root)
    try:
        return engine.fetch(sqlglot.parse_one(sql, read="duckdb"))
    finally:
        engine.close()


def tables_of(root) -> set[str]:
    return {name for (name,) in rows_of(root, "SELECT table_name FROM information_schema.tables")}


def test_score_writes_the_table_and_counts_rows_by_status(shop):
    result = score(load_project(shop), "returns", table="orders", into="scores", reasons=2)
    # Order 2 has no items (zero divisor) and order 6 no amount: both lack item_price, the first term.
    assert result.rows == 8
    assert result.status == {"missing: item_price": 2, "ok": 6}
    assert result.stale == ()
    assert tables_of(shop) == {"orders", "scores"}

    rows = rows_of(shop, "SELECT order_id, prediction, status, reason_1, reason_2 FROM scores ORDER BY order_id")
    # Order 1: amount 120.5, items 3, north. Plain arithmetic on ESTIMATES.
    eta = -0.5 + 0.01 * (120.5 / 3) - 0.8 * 1.0 + 0.25 * 3
    assert rows[0][1] == pytest.approx(1 / (1 + math.exp(-eta)), rel=1e-12)
    # contributions: item_price 0.01 * (40.1667 - 30) > 0, northern -0.8 * 0.5 < 0, items 0.25 * 0.5 > 0
    assert rows[0][2:] == ("ok", "items", "item_price")
    assert rows[1][1:] == (None, "missing: item_price", None, None)


def test_a_stale_model_is_refused_naming_the_term_and_its_exported_sql_does_not_change(shop):
    before = render_score_sql(load_project(shop), "returns", dialect="postgres", reasons=1)
    terms = (shop / "terms" / "basket.sql").read_text()
    (shop / "terms" / "basket.sql").write_text(terms.replace("amount / NULLIF(items, 0)", "amount / NULLIF(items + 1, 0)"))

    with pytest.raises(FeatpipeError, match=r"fitted/returns.yaml is stale: term 'item_price' changed meaning; run `featpipe fit"):
        score(load_project(shop), "returns", table="orders", into="scores")
    assert "scores" not in tables_of(shop)
    assert render_score_sql(load_project(shop), "returns", dialect="postgres", reasons=1) == before

    allowed = score(load_project(shop), "returns", table="orders", into="scores", allow_stale=True)
    assert allowed.stale == ("term 'item_price' changed meaning",)
    assert allowed.status == {"missing: item_price": 2, "ok": 6}  # still the fitted definition: items 0 is missing


def test_a_table_missing_a_contract_column_is_refused_and_nothing_is_written(shop):
    engine = database(shop)
    engine.execute(sqlglot.parse_one("CREATE TABLE batch AS SELECT order_id, amount, region FROM orders", read="duckdb"))
    engine.close()
    with pytest.raises(FeatpipeError) as refused:
        score(load_project(shop), "returns", table="batch", into="scores")
    assert str(refused.value) == (
        "featpipe.yaml: table 'batch' does not match the contract of input 'orders':\n"
        "  column 'items' (BIGINT) is missing from table 'batch'\n"
        "fix the data or the 'columns:' of input 'orders' in featpipe.yaml"
    )
    assert tables_of(shop) == {"orders", "batch"}


def test_a_text_column_where_a_number_is_declared_is_refused_and_nothing_is_written(shop):
    engine = database(shop)
    engine.execute(sqlglot.parse_one(
        "CREATE TABLE batch AS SELECT order_id, CAST(amount AS VARCHAR) AS amount, items, region FROM orders", read="duckdb"))
    engine.close()
    with pytest.raises(FeatpipeError, match=r"column 'amount' is declared DOUBLE \(floating point\) but table 'batch' has TEXT \(text\)"):
        score(load_project(shop), "returns", table="batch", into="scores")
    assert tables_of(shop) == {"orders", "batch"}


def test_a_table_to_score_needs_only_the_columns_the_model_reads(shop):
    """New orders have no outcome yet: the target column is not required."""
    engine = database(shop)
    engine.execute(sqlglot.parse_one("CREATE TABLE new_orders AS SELECT order_id, amount, items, region FROM orders", read="duckdb"))
    engine.close()
    assert score(load_project(shop), "returns", table="new_orders", into="scores").rows == 8


def test_a_failed_score_keeps_the_previous_output(shop):
    project = load_project(shop)
    score(project, "returns", table="orders", into="scores")
    with pytest.raises(FeatpipeError, match="table 'elsewhere' does not exist"):
        score(project, "returns", table="elsewhere", into="scores")
    assert rows_of(shop, "SELECT COUNT(*) FROM scores") == [(8,)]


def test_scoring_a_table_into_itself_is_refused(shop):
    with pytest.raises(FeatpipeError, match="--into 'orders' is the table being scored"):
        score(load_project(shop), "returns", table="orders", into="orders")


def test_no_fitted_file_is_a_clear_error(tmp_path):
    root = write_project(tmp_path / "shop")
    with pytest.raises(FeatpipeError, match="returns.yaml: no fitted file at .*; run `featpipe fit` first"):
        render_score_sql(load_project(root), "returns")


def test_exported_sql_names_the_fitted_file_hash_and_runs_without_featpipe(shop):
    from featpipe.fitted import file_hash

    project = load_project(shop)
    text = render_score_sql(project, "returns", dialect="duckdb", into="scores_sql")
    assert f"hash {file_hash(project.fitted_path('returns'))}" in text
    engine = database(shop)
    engine.connection.execute(text)  # the exported text as a data team runs it: one statement, comments included
    engine.close()
    assert rows_of(shop, "SELECT status, COUNT(*) FROM scores_sql GROUP BY status ORDER BY status") == [
        ("missing: item_price", 2), ("ok", 6)]


def test_unknown_dialect_is_refused(shop):
    with pytest.raises(FeatpipeError, match="unknown dialect 'oracle'"):
        render_score_sql(load_project(shop), "returns", dialect="oracle")


def test_score_runs_in_a_postgres_project(tmp_path, postgres_engine, monkeypatch):
    """The same command with `engine: {kind: postgres, dsn: ${SCORE_TEST_DSN}}`: the scores are written there."""
    from conftest import PROJECT_YAML

    monkeypatch.setenv("SCORE_TEST_DSN", postgres_engine.dsn)
    postgres_yaml = PROJECT_YAML.replace("  kind: duckdb\n  path: build/shop.duckdb\n", "  kind: postgres\n  dsn: ${SCORE_TEST_DSN}\n")
    root = write_project(tmp_path / "shop", {"featpipe.yaml": postgres_yaml})
    write_shop_fit(root)
    postgres_engine.load_file("orders", root / "data" / "orders.csv")
    result = score(load_project(root), "returns", table="orders", into="scores", reasons=1)
    assert (result.rows, result.status) == (8, {"missing: item_price": 2, "ok": 6})
    rows = postgres_engine.fetch(sqlglot.parse_one("SELECT prediction, status FROM scores WHERE order_id = 1"))
    eta = -0.5 + 0.01 * (120.5 / 3) - 0.8 * 1.0 + 0.25 * 3
    assert rows[0][0] == pytest.approx(1 / (1 + math.exp(-eta)), rel=1e-12) and rows[0][1] == "ok"
