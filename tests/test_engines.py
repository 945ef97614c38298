"""One adapter contract, checked on real DuckDB, SQLite, PostgreSQL and Spark.

Expected values come from the CSV text written in each test (plain arithmetic on it), from Python's
hashlib, and from the MD5 test suite published in RFC 1321 (appendix A.5).
"""

from __future__ import annotations

import hashlib
import math
import re
import subprocess
import sys
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlglot
from fixtures_engines import free_port, require_engine
from sqlglot import exp
from sqlite_engine import SQLiteEngine

from featpipe.engines import statements
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.errors import EngineError
from featpipe.project import EngineConfig

ENGINES = ["duckdb", "sqlite", "postgres", pytest.param("spark", marks=pytest.mark.spark)]

LEASES_CSV = """lease_id,monthly_payment,region
1,120.5,north
2,80.25,south
3,,east
4,300.0,north
"""
LEASE_ROWS = [(1, 120.5, "north"), (2, 80.25, "south"), (3, None, "east"), (4, 300.0, "north")]

# RFC 1321, appendix A.5 ("MD5 test suite").
RFC1321_MD5 = {
    "": "d41d8cd98f00b204e9800998ecf8427e",
    "a": "0cc175b9c0f1b6a831c399e269772661",
    "abc": "900150983cd24fb0d6963f7d28e17f72",
    "message digest": "f96b697d7cb7938d525a2f31aaf161d0",
}


@pytest.fixture(params=ENGINES)
def engine(request, tmp_path):
    kind = request.param
    if kind == "duckdb":
        engine = DuckDBEngine(tmp_path / "engine.duckdb")
    elif kind == "sqlite":
        engine = SQLiteEngine(tmp_path / "engine.sqlite")
    else:
        yield request.getfixturevalue(f"{kind}_engine")
        return
    yield engine
    engine.close()


def leases_file(tmp_path, text=LEASES_CSV, name="leases.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def with_settings(dsn: str, **settings: str) -> str:
    from psycopg.conninfo import make_conninfo

    return make_conninfo(dsn, **settings)


def sql(text: str) -> exp.Expression:
    """A tree from SQL written for a test (sqlglot's own dialect, rendered per engine by the adapter)."""
    return sqlglot.parse_one(text)


def type_family(data_type: exp.DataType) -> str:
    for family, kinds in (
        ("integer", exp.DataType.INTEGER_TYPES),
        ("real", exp.DataType.REAL_TYPES),
        ("text", exp.DataType.TEXT_TYPES),
    ):
        if data_type.is_type(*kinds):
            return family
    return data_type.sql()


def one_line_error(error: pytest.ExceptionInfo, engine_name: str) -> str:
    message = str(error.value)
    assert message.startswith(f"{engine_name}: ")
    assert "\n" not in message
    return message


@pytest.mark.parametrize("file_format", ["csv", "parquet"])
def test_load_file_then_describe_and_read_back(engine, tmp_path, file_format):
    path = leases_file(tmp_path)
    if file_format == "parquet":
        table = pa.table({name: [row[i] for row in LEASE_ROWS] for i, name in enumerate(["lease_id", "monthly_payment", "region"])})
        path = tmp_path / "leases.parquet"
        pq.write_table(table, path)
    engine.load_file("leases", path)

    columns = engine.describe("leases")
    assert {name: type_family(kind) for name, kind in columns.items()} == {
        "lease_id": "integer",
        "monthly_payment": "real",
        "region": "text",
    }
    assert list(columns) == ["lease_id", "monthly_payment", "region"]
    rows = engine.fetch(sql("SELECT lease_id, monthly_payment, region FROM leases ORDER BY lease_id"))
    assert [tuple(row) for row in rows] == LEASE_ROWS


def test_create_table_from_query_then_replace_it(engine, tmp_path):
    engine.load_file("leases", leases_file(tmp_path))
    doubled = sql(
        "SELECT lease_id, CAST(monthly_payment AS DOUBLE) * 2 AS twice FROM leases "
        "WHERE NOT monthly_payment IS NULL"
    )
    engine.create_table("doubled", doubled)
    assert engine.fetch(sql("SELECT lease_id, twice FROM doubled ORDER BY lease_id")) == [
        (1, 241.0),
        (2, 160.5),
        (4, 600.0),
    ]
    assert list(engine.describe("doubled")) == ["lease_id", "twice"]

    engine.create_table("doubled", sql("SELECT lease_id FROM leases WHERE region = 'north'"))
    assert engine.fetch(sql("SELECT lease_id FROM doubled ORDER BY lease_id")) == [(1,), (4,)]
    assert engine.describe(statements.building_name("doubled")) is None


# A query that plans fine and fails while rows are written, per engine (SQLite casts any text to 0,
# but ABS of the smallest 64-bit integer overflows).
FAILS_WHILE_RUNNING = {
    "duckdb": "SELECT CAST(region AS INT) AS broken FROM leases",
    "postgres": "SELECT CAST(region AS INT) AS broken FROM leases",
    "spark": "SELECT CAST(region AS INT) AS broken FROM leases",
    "sqlite": "SELECT ABS(lease_id - 9223372036854775807 - 2) AS broken FROM leases",
}


@pytest.mark.parametrize("failure", ["unknown column", "fails while running"])
def test_failed_create_table_keeps_the_previous_table(engine, tmp_path, failure):
    engine.load_file("leases", leases_file(tmp_path))
    engine.create_table("north", sql("SELECT lease_id FROM leases WHERE region = 'north'"))
    query = "SELECT no_such_column FROM leases" if failure == "unknown column" else FAILS_WHILE_RUNNING[engine.name]

    with pytest.raises(EngineError) as error:
        engine.create_table("north", sql(query))

    one_line_error(error, engine.name)
    assert engine.fetch(sql("SELECT lease_id FROM north ORDER BY lease_id")) == [(1,), (4,)]
    assert list(engine.describe("north")) == ["lease_id"]
    assert engine.describe(statements.building_name("north")) is None
    # Nothing of the failed build is in the way of the next one (Spark would refuse a leftover folder).
    engine.create_table("north", sql("SELECT lease_id FROM leases WHERE region = 'south'"))
    assert engine.fetch(sql("SELECT lease_id FROM north")) == [(2,)]


def test_missing_table_is_a_one_line_error_naming_the_engine(engine):
    with pytest.raises(EngineError) as error:
        engine.fetch(sql("SELECT * FROM no_such_table"))
    assert "no_such_table" in one_line_error(error, engine.name)
    assert engine.describe("no_such_table") is None
    engine.drop_table("no_such_table")  # dropping what is not there is not an error


def test_fetch_batches_and_frame(engine, tmp_path):
    engine.load_file("leases", leases_file(tmp_path))
    query = sql("SELECT lease_id, monthly_payment FROM leases ORDER BY lease_id")

    batches = list(engine.fetch_batches(query, 3))

    assert [batch.num_rows for batch in batches] == [3, 1]
    table = pa.Table.from_batches(batches)
    assert table.column("lease_id").to_pylist() == [1, 2, 3, 4]
    assert table.column("monthly_payment").to_pylist() == [120.5, 80.25, None, 300.0]
    frame = engine.fetch_frame(query)
    assert list(frame.columns) == ["lease_id", "monthly_payment"]
    assert frame["lease_id"].tolist() == [1, 2, 3, 4]
    assert math.isnan(frame["monthly_payment"][2]) and frame["monthly_payment"].sum() == 500.75


def test_md5_is_the_same_lowercase_hex_everywhere(engine):
    texts = [*RFC1321_MD5, "v1:12345", "Zürich lease"]
    query = exp.select(*(exp.MD5(this=exp.Literal.string(text)).as_(f"h{i}") for i, text in enumerate(texts)))

    (row,) = engine.fetch(query)

    assert list(row) == [hashlib.md5(text.encode("utf-8")).hexdigest() for text in texts]
    assert list(row[: len(RFC1321_MD5)]) == list(RFC1321_MD5.values())


def test_md5_renders_as_hex_text_for_bigquery():
    # BigQuery's MD5 returns bytes; sqlglot wraps it so every dialect compares hex text.
    assert exp.MD5(this=exp.column("k")).sql("bigquery") == "TO_HEX(MD5(k))"


def test_hash_split_selects_the_same_rows_everywhere(engine, tmp_path):
    ids = range(1, 201)
    engine.load_file("keys", leases_file(tmp_path, "lease_id\n" + "".join(f"{i}\n" for i in ids), "keys.csv"))
    salted = exp.Concat(
        expressions=[exp.Literal.string("v1"), exp.cast(exp.column("lease_id"), exp.DataType.build("VARCHAR"))]
    )
    prefix = exp.Substring(this=exp.MD5(this=salted), start=exp.Literal.number(1), length=exp.Literal.number(8))
    query = exp.select("lease_id").from_("keys").where(prefix < exp.Literal.string("4ccccccc")).order_by("lease_id")

    selected = [row[0] for row in engine.fetch(query)]

    expected = [i for i in ids if hashlib.md5(f"v1{i}".encode()).hexdigest()[:8] < "4ccccccc"]
    assert selected == expected
    assert 40 <= len(selected) <= 80  # 0x4ccccccc / 2**32 = 0.3 of the keys, give or take sampling


@pytest.mark.parametrize("kind", ["postgres", "sqlite"])
def test_failed_load_keeps_the_previous_table(kind, tmp_path, request):
    engine = request.getfixturevalue("postgres_engine") if kind == "postgres" else SQLiteEngine()
    engine.load_file("leases", leases_file(tmp_path))
    ragged = leases_file(tmp_path, "lease_id,monthly_payment,region\n5,10.0,west\n6\n", "ragged.csv")

    with pytest.raises(EngineError) as error:
        engine.load_file("leases", ragged)

    assert "ragged.csv" in one_line_error(error, kind)
    assert engine.fetch(sql("SELECT lease_id FROM leases ORDER BY lease_id")) == [(1,), (2,), (3,), (4,)]
    assert engine.describe(statements.building_name("leases")) is None


def test_postgres_server_not_running(postgres_dsn):
    from featpipe.engines.postgres import PostgresEngine

    port = free_port()
    dsn = with_settings(postgres_dsn, port=str(port))
    with pytest.raises(EngineError) as error:
        PostgresEngine(EngineConfig(kind="postgres", dsn=dsn))
    assert str(error.value) == f"postgres: no server answers at 127.0.0.1:{port}; is the server running?"


def test_postgres_wrong_password(postgres_dsn):
    from featpipe.engines.postgres import PostgresEngine

    dsn = with_settings(postgres_dsn, password="not-the-password")
    with pytest.raises(EngineError) as error:
        PostgresEngine(EngineConfig(kind="postgres", dsn=dsn))
    message = one_line_error(error, "postgres")
    assert "password authentication failed for user 'postgres'" in message
    assert "PGPASSWORD" in message and "not-the-password" not in message


def test_postgres_statement_timeout(postgres_dsn):
    from featpipe.engines.postgres import PostgresEngine

    engine = PostgresEngine(EngineConfig(kind="postgres", dsn=with_settings(postgres_dsn, options="-c statement_timeout=100")))
    try:
        with pytest.raises(EngineError) as error:
            engine.fetch(exp.select(exp.Anonymous(this="pg_sleep", expressions=[exp.Literal.number(5)])))
        assert "statement timeout" in one_line_error(error, "postgres")
        assert engine.fetch(exp.select(exp.Literal.number(1))) == [(1,)]  # the connection is still usable
    finally:
        engine.close()


def test_postgres_refuses_a_name_it_would_truncate(postgres_engine):
    with pytest.raises(EngineError) as error:
        postgres_engine.create_table("t" * 50, sql("SELECT 1 AS one"))
    assert "at most 44 bytes" in one_line_error(error, "postgres")


@pytest.mark.spark
def test_spark_keeps_tables_in_the_build_folder(spark_engine, spark_session):
    # The fixture's session was started by SparkEngine with engine.path in a build folder.
    warehouse = Path(spark_session.conf.get("spark.sql.warehouse.dir").removeprefix("file:"))
    assert warehouse.name == "spark-warehouse"
    assert spark_session.conf.get("spark.sql.catalogImplementation") == "hive"
    assert (warehouse.parent / "spark-metastore").is_dir()

    spark_engine.create_table("kept", sql("SELECT 1 AS one"))

    assert (warehouse / f"{spark_engine.database}.db" / "kept").is_dir()


def test_spark_refuses_a_metastore_another_process_holds(tmp_path):
    from featpipe.engines.spark import check_metastore_free

    metastore = tmp_path / "spark-metastore"
    metastore.mkdir()
    lock_file = metastore / "dbex.lck"
    lock_file.write_bytes(b"")
    # Derby locks dbex.lck with a Java FileLock, which is an fcntl lock on Linux; hold one the same way.
    holder = subprocess.Popen(
        [sys.executable, "-c", "import fcntl, sys, time; f = open(sys.argv[1], 'rb+'); "
         "fcntl.lockf(f, fcntl.LOCK_EX); print('locked', flush=True); time.sleep(60)", str(lock_file)],
        stdout=subprocess.PIPE, text=True,
    )  # fmt: skip
    try:
        assert holder.stdout.readline().strip() == "locked"
        with pytest.raises(EngineError) as error:
            check_metastore_free(metastore)
        assert "in use by another process" in one_line_error(error, "spark")
    finally:
        holder.kill()
        holder.wait()
    check_metastore_free(metastore)  # free again once the holder is gone


def test_spark_connect_url_with_no_server_fails_at_once():
    from featpipe.engines.spark import check_connect_server

    port = free_port()
    with pytest.raises(EngineError) as error:
        check_connect_server(f"sc://127.0.0.1:{port}")
    assert one_line_error(error, "spark").startswith(f"spark: no Spark Connect server answers at 127.0.0.1:{port} ")
    assert str(error.value).endswith("is the server running?")


@pytest.mark.parametrize(("ci", "outcome"), [("true", pytest.fail.Exception), ("", pytest.skip.Exception)])
def test_missing_engine_software_skips_locally_but_fails_in_ci(monkeypatch, ci, outcome):
    monkeypatch.setenv("CI", ci)
    with pytest.raises(outcome, match="postgres is not available: initdb not found"):
        require_engine("postgres", "initdb not found")


def test_sqlite_python_math_agrees_with_the_builtins():
    builtin = SQLiteEngine()
    if builtin.python_math:
        pytest.skip(f"this SQLite has no built-in {', '.join(builtin.python_math)} to compare against")
    fallback = SQLiteEngine(python_math=True)
    cases = [
        "LN(2.5)", "LN(0)", "LN(-5)", "LN('2.5')", "LN('abc')", "LN(NULL)",
        "SQRT(4)", "SQRT(-5)", "EXP(1)", "EXP(1000)", "EXP(-1000)",
        "POWER(2, 0.5)", "POWER(2, 3)", "POWER(0, -1)", "POWER(-8, 1.0 / 3)", "POWER(10, 400)", "POWER(-10, 401)",
        "LOG10(100)", "LOG10(0)", "LOG10(-1)", "FLOOR(2.5)", "FLOOR(-2.5)", "CEIL(2.5)", "CEIL(-2.5)", "FLOOR(NULL)",
    ]  # fmt: skip
    query = exp.select(*(sqlglot.parse_one(case, read="sqlite").as_(f"c{i}") for i, case in enumerate(cases)))
    assert fallback.python_math == ("ln", "exp", "sqrt", "power", "log10", "floor", "ceil")
    assert fallback.fetch(query) == builtin.fetch(query)


@pytest.mark.spark
def test_spark_compiles_an_aggregate_of_many_sums(spark_engine):
    """An IRLS pass of 16 terms sums 153 products in one aggregate. Spark runs a stage as generated code
    (its plan marks those operators *(n)) only up to spark.sql.codegen.maxFields fields, 100 by default;
    above that, row by row, three to four times slower (featpipe.engines.spark.CODEGEN_MAX_FIELDS)."""
    spark_engine.create_table("wide", sql("SELECT 1 AS id"))
    sums = ", ".join(f"SUM(id * {k}) AS s{k}" for k in range(153))
    frame = spark_engine.session.sql(spark_engine.render(sql(f"SELECT {sums} FROM wide")))
    frame.collect()
    plan = frame._jdf.queryExecution().executedPlan().toString()  # the plan as run (adaptive execution decides at run time)
    assert re.search(r"\*\(\d+\) HashAggregate", plan), plan
