"""Loads never lose data: a `load:` file is checked (columns, key) before it replaces the input's table.

Every case runs through the API on a small project whose engine is the project's own DuckDB file, a
PostgreSQL schema or a Spark database of the test fixtures. A refused file leaves the previous table
(same rows) and the build record as they were, so putting the good file back is all it takes. The
expected rows come from the CSV text the project was written with (tests/conftest.py ORDERS_CSV).
"""

from __future__ import annotations

import csv
import io
import re

import pytest
from conftest import ORDERS_CSV, PROJECT_YAML, copy_demo, run_featpipe, write_project
from sqlglot import exp
from sqlite_engine import SQLiteEngine

from featpipe import api
from featpipe.engines import statements
from featpipe.engines.builds import read_builds
from featpipe.engines.compute import build_designs
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.errors import EngineError, FeatpipeError
from featpipe.fitted.scoring import score
from featpipe.sqlgen.common import column

DUCKDB_BLOCK = "  kind: duckdb\n  path: build/shop.duckdb\n"
HEADER = "order_id,amount,items,region,returned\n"
FIX = "fix the data or declare another key in featpipe.yaml"


@pytest.fixture(params=["duckdb", "postgres", pytest.param("spark", marks=pytest.mark.spark)])
def engine_block(request, monkeypatch) -> str:
    """The engine block of featpipe.yaml: the project's own DuckDB, or a fixture's fresh schema or database."""
    if request.param == "postgres":
        monkeypatch.setenv("FEATPIPE_TEST_DSN", request.getfixturevalue("postgres_engine").dsn)
        return "  kind: postgres\n  dsn: ${FEATPIPE_TEST_DSN}\n"
    if request.param == "spark":
        return f"  kind: spark\n  database: {request.getfixturevalue('spark_engine').database}\n"
    return DUCKDB_BLOCK


def shop(tmp_path, engine_block: str) -> api.Project:
    settings = PROJECT_YAML.replace(DUCKDB_BLOCK, engine_block)
    return api.load_project(write_project(tmp_path / "shop", {"featpipe.yaml": settings}))


def orders_in_engine(project: api.Project) -> list[tuple]:
    with api.connect(project) as engine:
        query = exp.select(column("order_id"), column("amount"), column("region")).from_("orders").order_by(column("order_id"))
        return [(int(key), None if amount is None else float(amount), region) for key, amount, region in engine.fetch(query)]


def orders_in_csv(text: str) -> list[tuple]:
    rows = csv.DictReader(io.StringIO(text))
    return [(int(row["order_id"]), float(row["amount"]) if row["amount"] else None, row["region"]) for row in rows]


def refused_load(project: api.Project, data: str | bytes) -> str:
    """Compute with the good file, then with `data` as data/orders.csv: the message of the refusal, after
    checking that the table and the build record are what the good file left, and no temporary table."""
    path = project.root / "data" / "orders.csv"
    path.write_text(ORDERS_CSV, encoding="utf-8")
    api.compute(project)
    with api.connect(project) as engine:
        recorded = read_builds(engine)
    if isinstance(data, bytes):
        path.write_bytes(data)
    else:
        path.write_text(data, encoding="utf-8")

    with pytest.raises(FeatpipeError) as refused:
        api.compute(project)

    assert orders_in_engine(project) == orders_in_csv(ORDERS_CSV)
    with api.connect(project) as engine:
        assert read_builds(engine) == recorded
        assert engine.describe(statements.building_name("orders")) is None
    return str(refused.value)


def test_a_file_that_breaks_the_contract_keeps_the_old_table_and_a_restored_file_computes(tmp_path, engine_block):
    project = shop(tmp_path, engine_block)
    no_returned = "order_id,amount,items,region\n1,5.0,1,west\n2,6.0,2,west\n"

    message = refused_load(project, no_returned)

    assert message == (
        "featpipe.yaml: file data/orders.csv does not match the contract of input 'orders':\n"
        "  column 'returned' (BIGINT) is missing from file data/orders.csv\n"
        "fix the data or the 'columns:' of input 'orders' in featpipe.yaml"
    )
    (project.root / "data" / "orders.csv").write_text(ORDERS_CSV, encoding="utf-8")
    assert [(table.table, table.rows) for table in api.compute(project)] == [("design_returns", 8)]


def test_repeated_keys_are_refused_with_a_count_and_examples(tmp_path, engine_block):
    project = shop(tmp_path, engine_block)
    repeated = HEADER + "".join(f"{key},1.0,1,west,0\n" for key in (9, 2, 3, 2, 5, 3, 7, 3, 5, 9, 8))

    message = refused_load(project, repeated)

    assert message == f"data/orders.csv: key order_id is not unique: 4 keys appear more than once (e.g. 2, 3, 5); {FIX}"


def test_null_keys_are_refused_with_their_count(tmp_path, engine_block):
    project = shop(tmp_path, engine_block)
    null_keys = HEADER + "1,1.0,1,west,0\n,2.0,1,west,0\n4,3.0,1,west,0\n,4.0,1,west,0\n"

    assert refused_load(project, null_keys) == f"data/orders.csv: key order_id is NULL on 2 rows; {FIX}"
    assert refused_load(project, null_keys + "4,5.0,1,west,1\n") == (
        f"data/orders.csv: key order_id is NULL on 2 rows and is not unique: 1 key appears more than once (e.g. 4); {FIX}"
    )


def test_a_latin1_file_names_the_file_and_the_line(tmp_path, engine_block):
    project = shop(tmp_path, engine_block)
    latin1 = (HEADER + "1,1.0,1,west,0\n2,2.0,1,café,0\n").encode("latin-1")

    message = refused_load(project, latin1)

    engine = project.engine.kind
    path = project.root / "data" / "orders.csv"
    assert message == f"{engine}: cannot load {path}: line 3 is not UTF-8 text; save the file as UTF-8"


def test_an_empty_file_is_called_empty(tmp_path, engine_block):
    project = shop(tmp_path, engine_block)

    message = refused_load(project, "")

    engine = project.engine.kind
    path = project.root / "data" / "orders.csv"
    assert message == (
        f"{engine}: cannot load {path}: the file is empty; a CSV file starts with a header row naming the columns"
    )


def test_a_directory_as_load_is_called_a_directory(tmp_path):
    root = write_project(tmp_path / "shop")
    (root / "data" / "orders.csv").unlink()
    (root / "data" / "orders.csv").mkdir()

    done = run_featpipe("compute", "-p", str(root))

    assert done.returncode == 1
    assert done.stderr.strip().splitlines() == [
        "error: featpipe.yaml:8:11: data/orders.csv is a directory; point load at one .csv or .parquet file"
    ]


@pytest.mark.parametrize("kind", ["duckdb", "sqlite", "postgres", pytest.param("spark", marks=pytest.mark.spark)])
def test_an_engine_loading_a_directory_or_a_missing_file_names_it(kind, tmp_path, request):
    engine = {"duckdb": DuckDBEngine, "sqlite": SQLiteEngine}.get(kind)
    engine = engine() if engine else request.getfixturevalue(f"{kind}_engine")

    with pytest.raises(EngineError) as folder:
        engine.load_file("orders", tmp_path)
    with pytest.raises(EngineError) as missing:
        engine.load_file("orders", tmp_path / "orders.csv")

    assert str(folder.value) == f"{kind}: cannot load {tmp_path}: it is a directory; point 'load:' at one .csv or .parquet file"
    assert str(missing.value) == f"{kind}: cannot load {tmp_path / 'orders.csv'}: no such file"


def test_an_engine_table_without_load_is_key_checked_before_compute_and_before_scoring(tmp_path):
    """The lease demo with its leases in the engine rather than in a `load:` file, and a batch that
    repeats every retail lease (counted from the demo's CSV file)."""
    root = copy_demo("lease_default", tmp_path)
    settings = root / "featpipe.yaml"
    data = root / "data" / "leases.csv"
    settings.write_text(re.sub(r"\n *load: .*", "", settings.read_text(encoding="utf-8")), encoding="utf-8")
    project = api.load_project(root)
    with api.connect(project) as engine:
        engine.load_file("leases", data)
        leases = exp.select("*").from_("leases")
        engine.create_table("batch", exp.union(leases, leases.where(column("sector").eq("retail")), distinct=False))
    with data.open(newline="") as rows:
        retail = sorted(int(row["lease_id"]) for row in csv.DictReader(rows) if row["sector"] == "retail")
    repeated = f"key lease_id is not unique: {len(retail)} keys appear more than once (e.g. {retail[0]}, {retail[1]}, {retail[2]}); {FIX}"

    with pytest.raises(FeatpipeError) as scoring:
        score(project, "default_risk", table="batch", into="scores")

    assert str(scoring.value) == f"duckdb table 'batch': {repeated}"
    with api.connect(project) as engine:
        assert engine.describe("scores") is None
        engine.create_table("leases", exp.select("*").from_("batch"))
    with pytest.raises(FeatpipeError) as computing:
        api.compute(project)
    assert str(computing.value) == f"duckdb table 'leases': {repeated}"


def test_a_file_loaded_before_a_later_step_failed_is_recorded(tmp_path):
    """The build record names the file that is in the table, even when a design table then failed to
    build, so putting the old file back loads it again."""
    project = shop(tmp_path, DUCKDB_BLOCK)
    models = list(api.check(project).models.values())
    api.compute(project)
    data = project.root / "data" / "orders.csv"
    data.write_text(HEADER + "1,1.0,1,west,0\n", encoding="utf-8")

    class DesignsFail(DuckDBEngine):
        def create_table(self, name, query, check=None):
            if name.startswith("design_"):
                raise EngineError("duckdb: the disk is full")
            super().create_table(name, query, check)

    engine = DesignsFail(project.engine.path)
    try:
        with pytest.raises(EngineError):
            build_designs(engine, project, models)
    finally:
        engine.close()
    assert orders_in_engine(project) == [(1, 1.0, "west")]
    data.write_text(ORDERS_CSV, encoding="utf-8")
    api.compute(project)
    assert orders_in_engine(project) == orders_in_csv(ORDERS_CSV)
