"""The SQL featpipe exports for PostgreSQL runs with psql alone and gives featpipe's own answers.

`featpipe sql MODEL --part score|drift --dialect postgres` writes a file; PostgreSQL's own client
(`psql -v ON_ERROR_STOP=1 -f FILE`, connection from PG* environment variables only, no Python)
runs it on the test server, and its rows must equal what `featpipe score` wrote (row by row, every
column, numbers to 1e-12 relative) and what `featpipe drift` reported (every PSI). Both demo
projects, with their committed fitted files: a binomial model and a poisson model with an offset.
The command line also shows its engine errors: a stopped server and a wrong password each give one
line naming the engine and what to check, exit status 1, and no table.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import shutil
import subprocess
from pathlib import Path

import pytest
from conftest import copy_demo, run_featpipe
from fixtures_engines import free_port, postgres_programs, require_engine
from sqlglot import exp

from featpipe.project.names import LINEAR_PREDICTOR, STATUS, psi_column

NULL = "<null>"  # how psql is told to print NULL, so it differs from an empty text
POSTGRES_ENGINE = "  kind: postgres\n  dsn: ${FEATPIPE_TEST_DSN}\n"

# demo -> (input, key, model, engine block in its featpipe.yaml, a drifted batch picked from its rows)
DEMOS = {
    "lease_default": ("leases", "lease_id", "default_risk", "  kind: duckdb\n  path: build/lease_default.duckdb\n",
                      "sector = 'construction' OR firm_age_years < 3"),
    "fleet_claims": ("vehicle_years", "vehicle_year_id", "claim_frequency", "  kind: duckdb\n  path: build/fleet_claims.duckdb\n",
                     "vehicle_class = 'heavy_truck' OR annual_km > 60000"),
}


def psql_program() -> str:
    """psql from PATH, else next to the server programs the fixtures use."""
    found = shutil.which("psql")
    if found:
        return found
    programs = postgres_programs()
    if programs and Path(programs[0]).with_name("psql").is_file():
        return str(Path(programs[0]).with_name("psql"))
    require_engine("psql", "the psql client is not installed (Debian's postgresql package brings it)")


def psql_environment(dsn: str) -> dict[str, str]:
    """The DSN's connection settings as the PG* variables libpq (and so psql) reads."""
    from psycopg.conninfo import conninfo_to_dict

    names = {"host": "PGHOST", "port": "PGPORT", "user": "PGUSER", "password": "PGPASSWORD",
             "dbname": "PGDATABASE", "options": "PGOPTIONS"}
    settings = {names[key]: str(value) for key, value in conninfo_to_dict(dsn).items()}
    kept = {key: value for key, value in os.environ.items() if not key.startswith("PG")}
    return {**kept, **settings}


def run_psql(sql_file: Path, dsn: str) -> list[dict[str, str | None]]:
    """Run a SQL file with psql alone; its result as rows of text (None for NULL)."""
    done = subprocess.run(
        [psql_program(), "-X", "-q", "-v", "ON_ERROR_STOP=1", "--csv", "-P", f"null={NULL}", "-f", str(sql_file)],
        capture_output=True, text=True, env=psql_environment(dsn), timeout=120,
    )
    assert done.returncode == 0, done.stderr
    rows = list(csv.DictReader(io.StringIO(done.stdout)))
    return [{name: None if value == NULL else value for name, value in row.items()} for row in rows]


def featpipe(*args: str) -> str:
    """Run a featpipe command in this process (the CLI the user types); its standard output."""
    result = run_featpipe(*args)
    assert result.returncode == 0, result.stderr
    return result.stdout


@pytest.fixture
def postgres_demo(request, tmp_path, postgres_engine, monkeypatch):
    """A demo project (its committed fit) whose engine block points at the test server's fresh schema,
    with its data and a drifted batch loaded there."""
    name = request.param
    table, _key, _model, block, batch = DEMOS[name]
    root = copy_demo(name, tmp_path)
    settings = root / "featpipe.yaml"
    settings.write_text(settings.read_text(encoding="utf-8").replace(block, POSTGRES_ENGINE), encoding="utf-8")
    monkeypatch.setenv("FEATPIPE_TEST_DSN", postgres_engine.dsn)
    postgres_engine.load_file(table, root / "data" / f"{table}.csv")
    postgres_engine.create_table(f"{table}_batch", exp.select("*").from_(table).where(batch))
    return name, root, postgres_engine


def close(mine: str | None, theirs, where) -> None:
    """A psql text value against the value featpipe's engine returned: numbers to 1e-12 relative."""
    if theirs is None or mine is None:
        assert mine is None and theirs is None, where
    elif isinstance(theirs, float):
        assert math.isclose(float(mine), theirs, rel_tol=1e-12, abs_tol=1e-300), where
    else:
        assert mine == str(theirs), where


@pytest.mark.parametrize("postgres_demo", list(DEMOS), indirect=True)
def test_exported_scoring_sql_runs_in_psql_and_gives_featpipe_scores(postgres_demo, tmp_path):
    name, root, engine = postgres_demo
    table, key, model, _block, _batch = DEMOS[name]
    featpipe("score", model, "-p", str(root), "--table", table, "--into", "scores", "--reasons", "2", "--json")
    exported = tmp_path / "score.sql"
    exported.write_text(featpipe("sql", model, "-p", str(root), "--part", "score", "--dialect", "postgres",
                                 "--reasons", "2"), encoding="utf-8")

    from_psql = run_psql(exported, engine.dsn)
    frame = engine.fetch_frame(exp.select("*").from_("scores"))
    assert list(from_psql[0]) == list(frame.columns)
    by_key = {int(row[key]): row for row in from_psql}
    assert sorted(by_key) == sorted(frame[key].tolist()) and len(by_key) == len(from_psql) == len(frame)
    for record in frame.to_dict("records"):
        row = by_key[int(record[key])]
        for column_name, value in record.items():
            value = None if isinstance(value, float) and math.isnan(value) else value
            close(row[column_name], value, (record[key], column_name))
    assert {row[STATUS] for row in from_psql} >= {"ok"}
    assert sum(row[LINEAR_PREDICTOR] is not None for row in from_psql) == (frame[STATUS] == "ok").sum()


@pytest.mark.parametrize("postgres_demo", list(DEMOS), indirect=True)
def test_exported_drift_sql_runs_in_psql_and_gives_featpipe_drift(postgres_demo, tmp_path):
    name, root, engine = postgres_demo
    table, _key, model, _block, _batch = DEMOS[name]
    batch = f"{table}_batch"
    report = json.loads(featpipe("drift", model, "-p", str(root), "--table", batch, "--json"))
    exported = tmp_path / "drift.sql"
    exported.write_text(featpipe("sql", model, "-p", str(root), "--part", "drift", "--dialect", "postgres",
                                 "--table", batch), encoding="utf-8")

    (row,) = run_psql(exported, engine.dsn)
    reported = {item["name"]: item["psi"] for item in [report["score"], *report["terms"]]}
    assert len(reported) > 1 and max(reported.values()) > 0.01  # the batch did drift
    for term, psi in reported.items():
        assert math.isclose(float(row[psi_column(term)]), psi, rel_tol=1e-12, abs_tol=1e-15), term


# ---------------------------------------------------------------- engine errors at the command line


def compute_with_dsn(root: Path, dsn: str) -> subprocess.CompletedProcess:
    return run_featpipe("compute", "-p", str(root), env={"FEATPIPE_TEST_DSN": dsn})


@pytest.fixture
def postgres_project(tmp_path) -> Path:
    """The lease demo with a postgres engine block reading its DSN from FEATPIPE_TEST_DSN."""
    root = copy_demo("lease_default", tmp_path)
    settings = root / "featpipe.yaml"
    settings.write_text(settings.read_text(encoding="utf-8").replace(DEMOS["lease_default"][3], POSTGRES_ENGINE), encoding="utf-8")
    return root


def assert_one_line_engine_error(result: subprocess.CompletedProcess, *expected: str) -> None:
    assert result.returncode == 1, result.stderr
    assert result.stdout == ""
    lines = [line for line in result.stderr.splitlines() if not line.startswith("…")]  # progress lines
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("error: postgres: ")
    assert "Traceback" not in result.stderr
    for words in expected:
        assert words in lines[0], lines[0]


def test_compute_with_the_server_stopped(postgres_project):
    """A port where nothing listens: one line naming the address and what to check."""
    port = free_port()
    result = compute_with_dsn(postgres_project, f"host=127.0.0.1 port={port} user=postgres dbname=postgres")
    assert_one_line_engine_error(result, f"no server answers at 127.0.0.1:{port}", "is the server running?")
    assert not (postgres_project / "build").exists()


def test_the_drivers_own_error_is_shown_under_featpipe_debug(postgres_project):
    """One line by default; with FEATPIPE_DEBUG=1 also the traceback down to psycopg's own exception."""
    dsn = f"host=127.0.0.1 port={free_port()} user=postgres dbname=postgres"
    result = run_featpipe("compute", "-p", str(postgres_project), env={"FEATPIPE_TEST_DSN": dsn, "FEATPIPE_DEBUG": "1"})
    assert result.returncode == 1
    assert result.stderr.splitlines()[0].startswith("error: postgres: ")
    assert "psycopg.OperationalError" in result.stderr
    assert "The above exception was the direct cause of the following exception" in result.stderr


def test_compute_with_a_wrong_password(postgres_project, postgres_engine):
    """The test server refuses the password: one line naming the user and what to check; no table in the schema."""
    from psycopg.conninfo import make_conninfo

    dsn = make_conninfo(postgres_engine.dsn, password="not-the-password")
    result = compute_with_dsn(postgres_project, dsn)
    assert_one_line_engine_error(result, "password authentication failed for user 'postgres'",
                                 "check the user and password")
    assert "not-the-password" not in result.stderr
    tables = exp.select("table_name").from_("information_schema.tables").where(
        exp.column("table_schema").eq(exp.CurrentSchema()))
    assert postgres_engine.fetch(tables) == []
    assert not (postgres_project / "build").exists()
