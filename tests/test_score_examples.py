"""The scheduling scripts in examples/ run the exported SQL with no featpipe: DuckDB, PostgreSQL, Spark.

Each script's output table must hold exactly what `featpipe score` writes on DuckDB for the same fitted
file (the reference), to 1e-12 relative; status counts come from the eight rows of conftest.ORDERS_CSV.
"""

from __future__ import annotations

import importlib.util
import os
import shutil
import subprocess
import sys

import pytest
import sqlglot
from conftest import REPO
from fixtures_engines import require_engine
from test_score_command import database, shop  # noqa: F401 - shop is a fixture

from featpipe.fitted.scoring import render_score_sql, score
from featpipe.project import load_project

EXAMPLES = REPO / "examples"
STATUS_LINES = "2\tmissing: item_price\n6\tok\n"
SCORES = "SELECT order_id, prediction, linear_predictor, status, reason_1 FROM scores ORDER BY order_id"


def reference_rows(root) -> list[tuple]:
    """What `featpipe score` writes for the shop model on DuckDB."""
    score(load_project(root), "returns", table="orders", into="reference_scores", reasons=1)
    engine = database(root)
    try:
        return engine.fetch(sqlglot.parse_one(SCORES.replace("FROM scores", "FROM reference_scores")))
    finally:
        engine.close()


def assert_same_rows(actual, expected) -> None:
    assert len(actual) == len(expected)
    for got, want in zip(actual, expected):
        assert (got[0], *got[3:]) == (want[0], *want[3:])  # key, status, reason
        if want[1] is None:
            assert tuple(got[1:3]) == (None, None)
        else:
            assert tuple(got[1:3]) == pytest.approx(want[1:3], rel=1e-12)


def export(root, dialect: str, **wrapper) -> os.PathLike:
    path = root / f"returns.{dialect}.sql"
    path.write_text(render_score_sql(load_project(root), "returns", dialect=dialect, reasons=1, **wrapper))
    return path


def test_duckdb_script_builds_the_scores_and_replaces_them_on_the_next_run(shop):
    expected = reference_rows(shop)
    sql_file = export(shop, "duckdb", into="scores")
    command = ["bash", str(EXAMPLES / "duckdb" / "score.sh"), str(load_project(shop).engine.path), str(sql_file), "scores"]
    for _run in range(2):  # the second run replaces the first run's table
        done = subprocess.run(command, capture_output=True, text=True, env={**os.environ, "PYTHON": sys.executable})
        assert done.returncode == 0, done.stderr
        assert done.stdout == STATUS_LINES
    engine = database(shop)
    actual = engine.fetch(sqlglot.parse_one(SCORES))
    engine.close()
    assert_same_rows(actual, expected)


def test_duckdb_script_keeps_the_previous_scores_when_scoring_fails(shop):
    sql_file = export(shop, "duckdb", into="scores")
    command = ["bash", str(EXAMPLES / "duckdb" / "score.sh"), str(load_project(shop).engine.path), str(sql_file), "scores"]
    env = {**os.environ, "PYTHON": sys.executable}
    assert subprocess.run(command, capture_output=True, env=env).returncode == 0
    sql_file.write_text(sql_file.read_text().replace('FROM "orders"', 'FROM "no_such_orders"'))
    failed = subprocess.run(command, capture_output=True, text=True, env=env)
    assert failed.returncode == 1 and "scoring failed, previous scores kept" in failed.stderr
    engine = database(shop)
    assert engine.fetch(sqlglot.parse_one("SELECT COUNT(*) FROM scores")) == [(8,)]
    engine.close()


def test_postgres_script_runs_the_file_with_psql(shop, postgres_engine):
    psql = shutil.which("psql")
    if psql is None:
        require_engine("psql", "the psql client is not on PATH")
    expected = reference_rows(shop)
    postgres_engine.load_file("orders", shop / "data" / "orders.csv")
    sql_file = export(shop, "postgres", into="scores")
    command = ["bash", str(EXAMPLES / "postgres" / "score.sh"), str(sql_file), "scores"]
    for _run in range(2):
        done = subprocess.run(command, capture_output=True, text=True, env={**os.environ, "DATABASE_URL": postgres_engine.dsn})
        assert done.returncode == 0, done.stderr
        assert done.stdout == STATUS_LINES
    assert_same_rows(postgres_engine.fetch(sqlglot.parse_one(SCORES)), expected)


@pytest.mark.spark
def test_spark_script_runs_the_plain_query(shop, spark_engine):
    expected = reference_rows(shop)
    spark_engine.load_file("orders", shop / "data" / "orders.csv")
    sql_file = export(shop, "spark")
    spec = importlib.util.spec_from_file_location("spark_score_example", EXAMPLES / "spark" / "score.py")
    example = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(example)
    assert example.score(spark_engine.session, str(sql_file), "scores") == {"missing: item_price": 2, "ok": 6}
    assert_same_rows(spark_engine.fetch(sqlglot.parse_one(SCORES)), expected)
