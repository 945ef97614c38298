"""The whole pipeline where the data is: both demo projects checked, computed, fitted, scored,
drift-checked and reported on DuckDB, PostgreSQL and Spark, and the three engines' results compared.

Each engine runs the pipeline once per test module (module-scoped fixtures; Spark on the run's one
session), through the same API calls the CLI makes. References outside the project: the holdout
split is recomputed from the data files with Python's hashlib (MD5, RFC 1321), the row counts come
from the CSV files, and the DuckDB run (whose fits test_glm_reference checks against statsmodels)
is what PostgreSQL and Spark must reproduce: coefficients, standard errors and every other number of
the fitted file to 1e-9 relative, row counts and held-out rows exactly.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
import pytest
import yaml
from conftest import copy_demo
from sqlglot import exp

from featpipe import api
from featpipe.errors import FeatpipeError
from featpipe.fitted import file_hash
from featpipe.fitted.drift import DriftReport, drift
from featpipe.fitted.report import write_report
from featpipe.fitted.scoring import score
from featpipe.project.names import PREDICTION, STATUS
from featpipe.sqlgen.common import alias, column

DUCKDB_ENGINE = {
    "lease_default": "  kind: duckdb\n  path: build/lease_default.duckdb\n",
    "fleet_claims": "  kind: duckdb\n  path: build/fleet_claims.duckdb\n",
}


@dataclass(frozen=True)
class Demo:
    input: str
    key: str
    model: str  # fitted, scored, drift-checked and reported on every engine (one per demo keeps Spark quick)
    batch: str  # a condition picking a drifted batch out of the demo rows (SQL over the input)
    retyped: str  # a column the model reads, turned to text to break the contract


DEMOS = {
    "lease_default": Demo("leases", "lease_id", "default_risk",
                          "sector = 'construction' OR firm_age_years < 3", "monthly_revenue"),
    "fleet_claims": Demo("vehicle_years", "vehicle_year_id", "claim_frequency",
                         "vehicle_class = 'heavy_truck' OR annual_km > 60000", "night_km"),
}


@dataclass
class Run:
    """What one engine produced for both demos."""

    engine: str
    projects: dict[str, api.Project] = field(default_factory=dict)  # by demo
    checked: dict[str, api.CheckReport] = field(default_factory=dict)  # by demo
    built: dict[str, dict[str, int]] = field(default_factory=dict)  # by demo: design table -> rows
    # The rest by model:
    fitted: dict[str, dict] = field(default_factory=dict)  # the fitted file as YAML data
    held_out: dict[str, set[int]] = field(default_factory=dict)  # keys flagged _holdout in the design table
    scores: dict[str, pd.DataFrame] = field(default_factory=dict)  # the scores table, sorted by key
    drift: dict[str, DriftReport] = field(default_factory=dict)  # of the drifted batch
    reports: dict[str, str] = field(default_factory=dict)  # the page, engine name and fitted-file hash blanked
    refusals: dict[str, str] = field(default_factory=dict)  # scoring a table that breaks the contract
    left_behind: dict[str, bool] = field(default_factory=dict)  # did the refused score leave a table


def run_pipeline(engine_kind: str, engine_block: str | None, folder: Path) -> Run:
    """Copy both demos into `folder` with `engine_block` (None: their own DuckDB block) and run every step."""
    run = Run(engine_kind)
    for name, demo in DEMOS.items():
        root = copy_demo(name, folder)
        if engine_block is not None:
            settings = root / "featpipe.yaml"
            text = settings.read_text(encoding="utf-8")
            settings.write_text(text.replace(DUCKDB_ENGINE[name], engine_block), encoding="utf-8")
        model = demo.model
        root.joinpath("fitted", f"{model}.yaml").unlink()  # every engine fits from scratch
        project = api.load_project(root)
        assert project.engine.kind == engine_kind
        run.projects[name] = project

        run.checked[name] = api.check_report(project)
        run.built[name] = {table.table: table.rows for table in api.compute(project, [model])}
        api.fit(project, [model])
        with api.connect(project) as engine:
            engine.create_table(f"{demo.input}_batch", exp.select("*").from_(demo.input).where(demo.batch))
            kept = [column(c) for c in project.inputs[demo.input].columns if c != demo.retyped]
            retyped = alias(exp.cast(column(demo.retyped), "VARCHAR"), demo.retyped)
            engine.create_table(f"{demo.input}_retyped", exp.select(*kept, retyped).from_(demo.input))
            held = exp.select(column(demo.key)).from_(f"design_{model}").where(column("_holdout"))
            run.held_out[model] = {int(key) for (key,) in engine.fetch(held)}
        run.fitted[model] = yaml.safe_load(project.fitted_path(model).read_text(encoding="utf-8"))

        score(project, model, table=demo.input, into=f"scores_{model}", reasons=2)
        run.drift[model] = drift(project, model, f"{demo.input}_batch")
        with pytest.raises(FeatpipeError) as refused:
            score(project, model, table=f"{demo.input}_retyped", into=f"never_{model}")
        run.refusals[model] = str(refused.value)
        with api.connect(project) as engine:
            run.left_behind[model] = engine.describe(f"never_{model}") is not None
            scores = engine.fetch_frame(exp.select("*").from_(f"scores_{model}"))
        run.scores[model] = scores.sort_values(demo.key, ignore_index=True)
        page = write_report(project, model).read_text(encoding="utf-8")
        # The page names the fitted file's hash and the engine; the files agree to 1e-9, not byte for byte.
        page = page.replace(f"hash {file_hash(project.fitted_path(model))}", "hash HASH")
        run.reports[model] = page.replace(f"in the {engine_kind} engine", "in the ENGINE engine")
    return run


@pytest.fixture(scope="module")
def duckdb_run(tmp_path_factory) -> Run:
    return run_pipeline("duckdb", None, tmp_path_factory.mktemp("duckdb"))


@pytest.fixture(scope="module")
def postgres_run(tmp_path_factory, postgres_dsn) -> Run:
    """Both demos in one fresh schema of the test server, reached through `dsn: ${FEATPIPE_TEST_DSN}`."""
    import psycopg
    from psycopg.conninfo import make_conninfo

    schema = "featpipe_pipeline"
    with psycopg.connect(postgres_dsn, autocommit=True) as admin:
        admin.execute(f"DROP SCHEMA IF EXISTS {schema} CASCADE")
        admin.execute(f"CREATE SCHEMA {schema}")
    with pytest.MonkeyPatch.context() as patch:
        patch.setenv("FEATPIPE_TEST_DSN", make_conninfo(postgres_dsn, options=f"-c search_path={schema}"))
        yield run_pipeline("postgres", "  kind: postgres\n  dsn: ${FEATPIPE_TEST_DSN}\n", tmp_path_factory.mktemp("postgres"))
    with psycopg.connect(postgres_dsn, autocommit=True) as admin:
        admin.execute(f"DROP SCHEMA {schema} CASCADE")


@pytest.fixture(scope="module")
def spark_run(tmp_path_factory, spark_session) -> Run:
    """Both demos in one Spark database of the run's session (SparkEngine reuses the running session)."""
    database = "featpipe_pipeline"
    block = f"  kind: spark\n  path: build/spark\n  database: {database}\n"
    yield run_pipeline("spark", block, tmp_path_factory.mktemp("spark"))
    spark_session.catalog.setCurrentDatabase("default")
    spark_session.sql(f"DROP DATABASE IF EXISTS {database} CASCADE")


def csv_keys(name: str, demo: Demo) -> list[int]:
    with (Path(__file__).parent.parent / "projects" / name / "data" / f"{demo.input}.csv").open(newline="") as rows:
        return [int(row[demo.key]) for row in csv.DictReader(rows)]


def same_numbers(mine, theirs, where: str = "", rel: float = 1e-9) -> list[str]:
    """Where two parsed fitted files differ: numbers beyond `rel` (relative), anything else at all."""
    if isinstance(mine, dict) and isinstance(theirs, dict):
        if mine.keys() != theirs.keys():
            return [f"{where}: keys {sorted(mine)} != {sorted(theirs)}"]
        return [d for key in mine for d in same_numbers(mine[key], theirs[key], f"{where}.{key}", rel)]
    if isinstance(mine, list) and isinstance(theirs, list):
        if len(mine) != len(theirs):
            return [f"{where}: {len(mine)} items != {len(theirs)}"]
        return [d for i, (a, b) in enumerate(zip(mine, theirs)) for d in same_numbers(a, b, f"{where}[{i}]", rel)]
    numbers = (int, float)
    if isinstance(mine, numbers) and isinstance(theirs, numbers) and not isinstance(mine, bool):
        return [] if math.isclose(mine, theirs, rel_tol=rel, abs_tol=1e-300) else [f"{where}: {mine!r} != {theirs!r}"]
    return [] if mine == theirs else [f"{where}: {mine!r} != {theirs!r}"]


def plain(values: pd.Series) -> list:
    """The values with every missing one as None (a NULL text arrives as None or NaN, by engine)."""
    return values.astype(object).where(values.notna(), None).tolist()


@dataclass(frozen=True)
class PageParts:
    text: str  # the page with every number written as '#'
    numbers: list[float]


def page_parts(page: str) -> PageParts:
    """A report page split into its text and its numbers (figures and data sums differ in the last bits)."""
    number = re.compile(r"-?\d+(?:\.\d+)?(?:e[-+]?\d+)?")
    return PageParts(number.sub("#", page), [float(found) for found in number.findall(page)])


# ---------------------------------------------------------------- each engine on its own


@pytest.fixture(params=["duckdb", "postgres", pytest.param("spark", marks=pytest.mark.spark)])
def engine_run(request) -> Run:
    return request.getfixturevalue(f"{request.param}_run")


def test_every_step_runs_on_the_engine(engine_run):
    """check, compute, score, drift and report worked on the engine, on the demo data's rows."""
    run = engine_run
    assert {name: len(report.models) for name, report in run.checked.items()} == {"lease_default": 2, "fleet_claims": 2}
    rows = {name: len(csv_keys(name, demo)) for name, demo in DEMOS.items()}  # 5000 and 4000 lines of data
    assert run.built == {
        "lease_default": {"design_default_risk": rows["lease_default"]},
        "fleet_claims": {"design_claim_frequency": rows["fleet_claims"]},
    }
    for name, demo in DEMOS.items():
        scores = run.scores[demo.model]
        assert scores[demo.key].tolist() == sorted(csv_keys(name, demo))
        complete = run.fitted[demo.model]["rows"]["complete"]
        assert (scores[STATUS] == "ok").sum() == complete
        assert scores[PREDICTION].notna().sum() == complete
        assert run.drift[demo.model].rows > 0 and math.isfinite(run.drift[demo.model].score.psi)
    for model, page in run.reports.items():
        assert page.startswith("<!DOCTYPE html>") and "in the ENGINE engine" in page, model


def test_the_contract_is_checked_against_the_engines_own_table(engine_run):
    """A table whose column the model reads holds text instead of a number: refused before any table is written."""
    for demo in DEMOS.values():
        message = engine_run.refusals[demo.model]
        assert message.startswith(f"featpipe.yaml: table '{demo.input}_retyped' does not match the contract")
        assert f"column '{demo.retyped}' is declared DOUBLE (floating point)" in message
        assert "(text)" in message
        assert engine_run.left_behind[demo.model] is False


def test_the_holdout_split_is_the_md5_split_of_the_keys(engine_run):
    """Held-out rows are those whose MD5('v1:' || key) starts below 0.3 * 16**8 in hex (hashlib, RFC 1321)."""
    for name, demo in DEMOS.items():
        threshold = round(0.3 * 16**8)
        expected = {
            key for key in csv_keys(name, demo)
            if int(hashlib.md5(f"v1:{key}".encode()).hexdigest()[:8], 16) < threshold
        }
        assert engine_run.held_out[demo.model] == expected, demo.model


# ---------------------------------------------------------------- the engines against each other


@pytest.fixture(params=["postgres", pytest.param("spark", marks=pytest.mark.spark)])
def other_run(request) -> Run:
    """PostgreSQL's run, then Spark's: each is held against DuckDB's."""
    return request.getfixturevalue(f"{request.param}_run")


def test_the_three_engines_fit_the_same_models(duckdb_run, other_run):
    """Fitted files from PostgreSQL and Spark equal DuckDB's: coefficients, standard errors and every other
    number to 1e-9 relative, row counts, held-out rows and texts exactly (IRLS passes may differ)."""
    other = other_run
    for model, fitted in duckdb_run.fitted.items():
        theirs = other.fitted[model]
        assert theirs["rows"] == fitted["rows"], (other.engine, model)
        assert other.held_out[model] == duckdb_run.held_out[model], (other.engine, model)
        for mine, their in zip(fitted["terms"], theirs["terms"], strict=True):
            for number in ("estimate", "std_error"):
                assert their[number] == pytest.approx(mine[number], rel=1e-9), (other.engine, model, mine["name"], number)
        mine_fit, their_fit = dict(fitted["fit"]), dict(theirs["fit"])
        del mine_fit["iterations"], their_fit["iterations"]
        del mine_fit["passes"], their_fit["passes"]  # a streamed fit reads the rows fewer times than SQL aggregates
        differences = same_numbers({**fitted, "fit": mine_fit}, {**theirs, "fit": their_fit})
        assert differences == [], (other.engine, model)


def test_the_three_engines_score_drift_and_report_alike(duckdb_run, other_run):
    """Scores row by row, every PSI, and the report pages (engine name and fitted-file hash aside) equal DuckDB's."""
    other = other_run
    for model, expected in duckdb_run.scores.items():
        scores = other.scores[model]
        assert list(scores.columns) == list(expected.columns), (other.engine, model)
        for name in expected.columns:
            if pd.api.types.is_float_dtype(expected[name]):
                pd.testing.assert_series_equal(scores[name], expected[name], rtol=1e-9, atol=1e-300, check_dtype=False)
            else:
                assert plain(scores[name]) == plain(expected[name]), (other.engine, model, name)
        mine, theirs = duckdb_run.drift[model], other.drift[model]
        assert theirs.rows == mine.rows
        for their_row, my_row in zip((theirs.score, *theirs.terms), (mine.score, *mine.terms), strict=True):
            assert (their_row.name, their_row.reading) == (my_row.name, my_row.reading)
            assert their_row.psi == pytest.approx(my_row.psi, rel=1e-9, abs=1e-15), (other.engine, model, my_row.name)
            assert [b.rows for b in their_row.bins] == [b.rows for b in my_row.bins]
    for model, page in duckdb_run.reports.items():
        mine, theirs = page_parts(page), page_parts(other.reports[model])
        assert theirs.text == mine.text, (other.engine, model)  # the same page around the numbers
        assert theirs.numbers == pytest.approx(mine.numbers, rel=1e-9, abs=1e-12), (other.engine, model)


def test_postgres_plans_each_layer_of_a_query_apart(postgres_run):
    """The adapter fences every derived table with OFFSET 0, so PostgreSQL keeps each layer of the X'WX
    query apart instead of pulling the layers up and copying the fitted mean's EXP into every one of the
    p(p+1)/2 sums that use it (on this demo: 7.5 s flattened against 32 ms fenced, measured once by hand).
    EXPLAIN VERBOSE lists the expressions each plan node computes, so the copies can be counted."""
    import psycopg

    from featpipe.engines.postgres import PostgresEngine
    from featpipe.glm.families import BOUNDARY_ETA, get_family
    from featpipe.sqlgen.statistics import ModelRequest, statistics_query

    project = postgres_run.projects["lease_default"]
    layout = api.check(project).models["default_risk"].layout
    query = statistics_query(layout, "binomial", dict.fromkeys(layout.terms, 0.0), dict.fromkeys(layout.terms, 1.0),
                             [ModelRequest(layout.terms, (0.0,) * (1 + len(layout.terms)))],
                             eta_limit=get_family("binomial").eta_limit, boundary_eta=BOUNDARY_ETA)
    engine = PostgresEngine(project.engine)
    try:
        fenced = engine.render(query)
    finally:
        engine.close()
    flattened = query.sql(dialect="postgres", identify=True)  # what sqlglot alone renders
    written = fenced.lower().count("exp(")

    def planned(text: str) -> int:
        with psycopg.connect(project.engine.dsn) as connection:
            ((plan,),) = connection.execute("EXPLAIN (VERBOSE, FORMAT JSON) " + text).fetchall()
        return json.dumps(plan).lower().count("exp(")

    assert "OFFSET 0" in fenced and "OFFSET" not in flattened
    assert planned(fenced) <= 2 * written  # each layer's output is listed by the node above it too
    assert planned(flattened) >= 20 * written


def test_a_command_that_changes_nothing_writes_no_table(tmp_path):
    """A fit or report over up-to-date design tables leaves the engine's tables alone, the build record
    included (on Spark each rewrite of a table costs seconds of metastore work)."""
    from featpipe.engines.compute import build_designs
    from featpipe.engines.duckdb import DuckDBEngine

    class Recording(DuckDBEngine):
        def __init__(self, path):
            super().__init__(path)
            self.written: list[str] = []

        def create_table(self, name, query, check=None):
            self.written.append(name)
            super().create_table(name, query, check)  # DuckDB's load_file builds through create_table too

    project = api.load_project(copy_demo("fleet_claims", tmp_path))
    models = list(api.check(project).models.values())
    engine = Recording(project.engine.path)
    try:
        build_designs(engine, project, models)
        assert sorted(engine.written) == ["claim_costs", "design_claim_frequency", "design_claim_severity", "featpipe_builds",
                                          "vehicle_years"]
        engine.written.clear()
        build_designs(engine, project, models, only_stale=True)
        write_report(project, "claim_frequency", engine=engine, out=tmp_path / "report.html")
        assert [name for name in engine.written if not name.startswith("featpipe_report_")] == []  # the report's grids
    finally:
        engine.close()


@pytest.mark.spark
def test_spark_percentiles_are_exact_and_interpolated(spark_engine, tmp_path):
    """The report's ranges use PERCENTILE_CONT; on Spark it must not turn into PERCENTILE_APPROX.
    Expected: numpy's default (linear) quantile of 1, 2, 4, 10 at 0.25 is 1.75; the median is 3.0."""
    import numpy as np

    from featpipe.fitted.report.queries import _percentile

    path = tmp_path / "sample.csv"
    path.write_text("x\n1.0\n2.0\n4.0\n10.0\n\n", encoding="utf-8")
    spark_engine.load_file("sample", path)
    query = exp.select(_percentile(column("x"), 0.25), _percentile(column("x"), 0.5)).from_("sample")
    assert spark_engine.fetch(query) == [(np.quantile([1, 2, 4, 10], 0.25), np.quantile([1, 2, 4, 10], 0.5))]


@pytest.mark.spark
def test_spark_returns_results_larger_than_one_direct_task_result(spark_engine):
    """A task result above spark.task.maxDirectResultSize (1 MB by default) travels through the block
    manager, at the address the driver advertises; the fit's warm-start sample (up to 100,000 rows)
    is such a result on any table of a million rows. 300,000 rows of two BIGINTs are about 4.8 MB."""
    rows = 300_000
    numbers = exp.select(alias(column("id"), "i"), alias(exp.Mul(this=column("id"), expression=exp.Literal.number(2)), "twice"))
    query = numbers.from_(exp.Anonymous(this="range", expressions=[exp.Literal.number(rows)]))
    frame = spark_engine.fetch_frame(query)
    assert len(frame) == rows
    assert int(frame["twice"].sum()) == rows * (rows - 1)  # twice the sum 0 + 1 + ... + (rows - 1)
