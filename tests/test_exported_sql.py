"""What `featpipe sql` prints for an engine's dialect is the SQL that engine's adapter runs: one renderer
serves both, so a team scheduling the exported query gets the plan featpipe measured."""

from __future__ import annotations

import pytest
from conftest import copy_demo

from featpipe.engines.duckdb import DuckDBEngine
from featpipe.fitted.scoring import load_fitted, render_score_sql, scoring_model
from featpipe.project import load_project
from featpipe.sqlgen.score import score_statement

MODEL = "default_risk"


@pytest.fixture(scope="module")
def lease(tmp_path_factory):
    return load_project(copy_demo("lease_default", tmp_path_factory.mktemp("exported")))


def exported_body(project, dialect: str) -> str:
    """The printed query without its header comment and final semicolon."""
    text = render_score_sql(project, MODEL, dialect=dialect)
    return "\n".join(line for line in text.splitlines() if not line.startswith("-- ")).removesuffix(";")


def statement(project):
    return score_statement(scoring_model(load_fitted(project, MODEL)))


def test_postgres_export_carries_the_planner_fences_the_adapter_runs(lease, postgres_engine):
    body = exported_body(lease, "postgres")
    assert body == postgres_engine.render(statement(lease))
    # Every step of the scoring query is fenced, as the adapter fences it (PostgreSQL: OFFSET 0 keeps
    # the planner from copying a step's expressions into the next one).
    assert body.count("OFFSET 0") == len(statement(lease).ctes)


def test_spark_export_is_what_the_spark_adapter_runs(lease, spark_engine):
    assert exported_body(lease, "spark") == spark_engine.render(statement(lease))


def test_duckdb_export_is_what_the_duckdb_adapter_runs(lease, tmp_path):
    engine = DuckDBEngine(tmp_path / "scratch.duckdb")
    try:
        assert exported_body(lease, "duckdb") == engine.render(statement(lease))
    finally:
        engine.close()
