"""Hardened terms give one answer on DuckDB, SQLite and PostgreSQL, edge cases included.

The engine differences are those featpipe/sqlgen/harden.py's docstring lists, measured on the
engines themselves. Each
expression below is hardened, rendered per dialect and run on real engines over rows chosen to hit
those edges (NULLs, zero divisors, negative logarithms, huge exponents, integer operands, halves,
booleans); every engine must return exactly the same DOUBLE (or NULL) in every cell.
PostgreSQL runs when a server is reachable through the PG* environment variables.
"""

from __future__ import annotations

import math
import sqlite3

import duckdb
import pytest
import sqlglot
from sqlglot import exp

from featpipe.sqlgen.common import column, render
from featpipe.sqlgen.harden import as_number, harden

SCHEMA = {"id": "BIGINT", "a": "BIGINT", "b": "BIGINT", "x": "DOUBLE", "y": "DOUBLE", "flag": "BOOLEAN", "s": "VARCHAR"}
CREATE_TABLE = "CREATE TABLE edge (id BIGINT, a BIGINT, b BIGINT, x DOUBLE, y DOUBLE, flag BOOLEAN, s VARCHAR)"
ROWS = [
    # id,  a,          b,    x,                    y,      flag,  s
    (1, 7, 2, 2.5, 0.5, True, "North"),
    (2, -7, 0, 0.0, -1.0, False, " south "),
    (3, None, 3, -5.0, None, None, None),
    (4, 5, -3, 1000.0, 2.0, True, "east"),
    (5, 0, None, None, -0.5, False, ""),
    (6, 8, 4, -1000.0, 3.0, None, "West"),
    (7, 1, 1, 2.675, -2.0, True, "x"),
    (8, -2, 5, -2.5, 0.0, False, "North"),
    (9, 3, 7, 3.5, 10.0, True, "south"),
    (10, 9, -2, 0.49999999999999994, -3.0, False, "east"),
    (11, 2147483647, 2, 2147483647.5, 1e-10, True, "n"),
    (12, -4, 3, -8.0, 0.5, None, "q"),
    (13, 12, 5, 127.5, 1.0, False, "South"),
    (14, 6, 4, 1e17, 0.25, True, "z"),
]

# (term as written in a term file, whether its value is boolean)
TERMS = [
    ("a / b", False),
    ("x / y", False),
    ("a / NULLIF(b, 0)", False),
    ("7 / 2 + a", False),
    ("a % b", False),
    ("x % y", False),
    ("LN(x)", False),
    ("LOG10(x)", False),
    ("LOG(2, x)", False),
    ("LOG(y, x)", False),
    ("SQRT(x)", False),
    ("EXP(x)", False),
    ("EXP(-x)", False),
    ("POWER(x, y)", False),
    ("POWER(x, 2)", False),
    ("POWER(x, 0.5)", False),
    ("POWER(y, -1)", False),
    ("ROUND(x)", False),
    ("ROUND(x, 2)", False),
    ("ROUND(x * 1000, -2)", False),
    ("CAST(x AS INTEGER)", False),
    ("CAST(x AS TINYINT)", False),
    ("CAST(x AS DECIMAL(6, 1))", False),
    ("CAST(x AS BOOLEAN)", True),
    ("GREATEST(a, b, x)", False),
    ("LEAST(x, y)", False),
    ("flag * 2 + 1", False),
    ("(x > 1) + (a < b)", False),
    ("flag", True),
    ("x > y AND flag", True),
    ("NOT flag OR a IS NULL", True),
    ("CASE WHEN x > 1 THEN 1 ELSE 0 END", False),
    ("IF(flag, a, b)", False),
    ("COALESCE(x, y, 0)", False),
    ("x BETWEEN 0 AND 3", True),
    ("s IN ('North', 'east')", True),
    ("LOWER(TRIM(s)) = 'south'", True),
    ("LENGTH(s) / 2", False),
    ("-a * 0.3", False),
    ("ABS(a - x) + SIGN(y)", False),
    ("FLOOR(x / 3) + CEIL(y)", False),
    ("CAST(flag AS INTEGER) + a", False),
    ("CAST(a AS DOUBLE) / 4", False),
]

# Cells written out by hand: (term, row id) -> value.
EXPECTED = {
    ("a / b", 1): 3.5,  # 7 / 2 = 3.5; integer division on PostgreSQL and SQLite would give 3
    ("a / b", 2): None,  # b = 0: NULL, where DuckDB gives inf and PostgreSQL raises
    ("7 / 2 + a", 1): 10.5,  # 3.5 + 7
    ("a % b", 4): 2.0,  # 5 % -3 = 5 - (-3) * trunc(-1.67) = 5 - 3 = 2, sign of the dividend
    ("a % b", 2): None,  # % 0
    ("x % y", 1): 0.0,  # 2.5 % 0.5 = 0 (SQLite would truncate both to integers first)
    ("x % y", 8): None,  # -2.5 % 0.0
    ("LN(x)", 2): None,  # LN(0): DuckDB -inf, PostgreSQL error, SQLite NULL
    ("LN(x)", 3): None,  # LN(-5): DuckDB NaN
    ("LOG10(x)", 4): math.log(1000) / math.log(10),  # LN(1000) / LN(10) = 2.9999999999999996
    ("LOG(2, x)", 1): math.log(2.5) / math.log(2),
    ("LOG(y, x)", 13): None,  # base 1: LN(1) = 0 is not a divisor
    ("SQRT(x)", 3): None,  # SQRT(-5): DuckDB NaN, PostgreSQL error
    ("SQRT(x)", 1): math.sqrt(2.5),
    ("EXP(x)", 4): math.exp(700),  # EXP(1000) clamped to EXP(700) = 1.0142320547350045e304
    ("EXP(-x)", 4): math.exp(-700),  # EXP(-1000) clamped to EXP(-700)
    ("EXP(x)", 6): math.exp(-700),
    ("POWER(x, y)", 12): None,  # (-8) ** 0.5 is not real: PostgreSQL error, DuckDB NaN
    ("POWER(x, y)", 2): None,  # 0 ** -1: PostgreSQL error, DuckDB inf
    ("POWER(x, y)", 6): -1e9,  # (-1000) ** 3, a whole exponent
    ("POWER(x, y)", 8): 1.0,  # (-2.5) ** 0
    ("POWER(y, -1)", 8): None,  # 1 / 0
    ("ROUND(x)", 1): 3.0,  # 2.5 rounds away from zero; PostgreSQL's ROUND(2.5) is 2
    ("ROUND(x)", 8): -3.0,  # -2.5 -> -3
    ("ROUND(x)", 10): 0.0,  # 0.49999999999999994 -> 0 (adding 0.5 first would give 1)
    ("ROUND(x, 2)", 7): 2.68,  # 2.675 * 100 is exactly 267.5 in DOUBLE, rounded up
    ("ROUND(x * 1000, -2)", 7): 2700.0,  # 2675 -> 2700
    ("ROUND(x, 2)", 14): 1e17,  # already whole: kept as it is, never floored
    ("CAST(x AS INTEGER)", 1): 2.0,  # 2.5 -> 2, ties to even as DuckDB and PostgreSQL (SQLite: 2 by truncation)
    ("CAST(x AS INTEGER)", 9): 4.0,  # 3.5 -> 4 (SQLite and Spark truncate to 3)
    ("CAST(x AS INTEGER)", 8): -2.0,  # -2.5 -> -2
    ("CAST(x AS INTEGER)", 11): None,  # 2147483647.5 -> 2147483648 is out of INTEGER's range
    ("CAST(x AS TINYINT)", 13): None,  # 127.5 -> 128 is out of TINYINT's range
    ("CAST(x AS DECIMAL(6, 1))", 7): 2.7,  # 2.675 -> 2.7
    ("CAST(x AS DECIMAL(6, 1))", 6): -1000.0,
    ("CAST(x AS DECIMAL(6, 1))", 11): None,  # more than 5 digits before the point
    ("CAST(x AS BOOLEAN)", 2): 0.0,  # 0.0 <> 0 is false
    ("CAST(x AS BOOLEAN)", 10): 1.0,
    ("GREATEST(a, b, x)", 3): None,  # GREATEST(NULL, 3, -5): a missing input stays missing (featpipe's rule)
    ("LEAST(x, y)", 5): None,  # LEAST(NULL, -0.5): NULL, where DuckDB's own LEAST gives -0.5
    ("GREATEST(a, b, x)", 1): 7.0,  # GREATEST(7, 2, 2.5)
    ("LEAST(x, y)", 1): 0.5,  # LEAST(2.5, 0.5)
    ("flag * 2 + 1", 1): 3.0,  # TRUE counts 1
    ("flag * 2 + 1", 3): None,  # NULL stays NULL
    ("(x > 1) + (a < b)", 1): 1.0,  # (2.5 > 1) + (7 < 2) = 1 + 0
    ("flag", 2): 0.0,
    ("flag", 3): None,
    ("IF(flag, a, b)", 2): 0.0,  # not flag: b = 0
    ("COALESCE(x, y, 0)", 5): -0.5,
    ("s IN ('North', 'east')", 3): None,
    ("LOWER(TRIM(s)) = 'south'", 2): 1.0,
    ("LENGTH(s) / 2", 2): 3.5,  # ' south ' has 7 characters
    ("-a * 0.3", 1): -7 * 0.3,  # DOUBLE arithmetic; PostgreSQL's NUMERIC would give exactly -2.1
    ("FLOOR(x / 3) + CEIL(y)", 1): 1.0,  # floor(0.83) + ceil(0.5) = 0 + 1
    ("CAST(flag AS INTEGER) + a", 1): 8.0,
}


def value_expression(term: str, is_boolean: bool) -> exp.Expression:
    parsed = sqlglot.parse_one(term, dialect="duckdb")
    return as_number(harden(parsed, SCHEMA), is_boolean)


def query(dialect: str) -> str:
    values = [exp.alias_(value_expression(term, boolean), f"v{index}") for index, (term, boolean) in enumerate(TERMS)]
    statement = exp.select(column("id"), *values).from_(exp.to_table("edge")).order_by(column("id"))
    return render(statement, dialect)


def create_table(dialect: str) -> str:
    return sqlglot.transpile(CREATE_TABLE, read="duckdb", write=dialect)[0]


def run_duckdb() -> list[tuple]:
    connection = duckdb.connect()
    connection.execute(create_table("duckdb"))
    connection.executemany("INSERT INTO edge VALUES (?, ?, ?, ?, ?, ?, ?)", ROWS)
    return connection.execute(query("duckdb")).fetchall()


def run_sqlite() -> list[tuple]:
    connection = sqlite3.connect(":memory:")
    available = {name for (name,) in connection.execute("SELECT name FROM pragma_function_list")}
    # Builds without the math functions (SQLite before 3.35, or compiled without them) get Python's.
    fallbacks = {"ln": math.log, "exp": math.exp, "sqrt": math.sqrt, "power": math.pow, "sign": _sign,
                 "floor": math.floor, "ceil": math.ceil}
    for name, function in fallbacks.items():
        if name not in available:
            connection.create_function(name, -1, _null_safe(function), deterministic=True)
    connection.execute(create_table("sqlite"))
    connection.executemany("INSERT INTO edge VALUES (?, ?, ?, ?, ?, ?, ?)", ROWS)
    return connection.execute(query("sqlite")).fetchall()


def _sign(value):
    return (value > 0) - (value < 0)


def _null_safe(function):
    return lambda *args: None if any(arg is None for arg in args) else float(function(*args))


def run_postgres(dsn: str) -> list[tuple]:
    import psycopg

    with psycopg.connect(dsn, autocommit=True) as connection:
        connection.execute(create_table("postgres").replace("CREATE TABLE", "CREATE TEMPORARY TABLE", 1))
        with connection.cursor() as cursor:
            cursor.executemany("INSERT INTO edge VALUES (%s, %s, %s, %s, %s, %s, %s)", ROWS)
        return connection.execute(query("postgres")).fetchall()


@pytest.fixture(scope="module")
def duckdb_rows():
    return run_duckdb()


def cells(rows: list[tuple]) -> dict[tuple[str, int], float | None]:
    return {(term, row[0]): row[index + 1] for row in rows for index, (term, _) in enumerate(TERMS)}


def test_hand_computed_cells(duckdb_rows):
    found = cells(duckdb_rows)
    for key, expected in EXPECTED.items():
        assert found[key] == expected, key


def test_every_value_is_a_double_or_null(duckdb_rows):
    for row in duckdb_rows:
        assert all(value is None or isinstance(value, float) for value in row[1:]), row


def test_sqlite_gives_the_same_answers(duckdb_rows):
    assert_same(cells(duckdb_rows), cells(run_sqlite()), "sqlite")


def test_postgres_gives_the_same_answers(duckdb_rows, postgres_dsn):
    postgres = run_postgres(postgres_dsn)
    assert all(value is None or isinstance(value, float) for row in postgres for value in row[1:])
    assert_same(cells(duckdb_rows), cells(postgres), "postgres")


def assert_same(reference: dict, other: dict, engine: str) -> None:
    different = {key: (reference[key], other[key]) for key in reference if reference[key] != other[key]}
    assert not different, f"{engine} differs from duckdb (term, row): (duckdb, {engine}): {different}"


# Where the hardened term knowingly differs from DuckDB's own answer to the term as written.
NATIVE_FAILS = {  # DuckDB raises for some row, so it has no answer for the column to compare with
    "a % b": "% by zero raises",
    "CAST(x AS INTEGER)": "out-of-range cast raises (the hardened cast gives NULL)",
    "CAST(x AS TINYINT)": "out-of-range cast raises",
    "CAST(x AS DECIMAL(6, 1))": "out-of-range cast raises",
    "flag * 2 + 1": "DuckDB has no BOOLEAN arithmetic",
    "(x > 1) + (a < b)": "DuckDB has no BOOLEAN arithmetic",
}
NATIVE_DIFFERS = {
    # 2.675 is stored as 2.67499999999999982...; DuckDB rounds that binary value down, the hardened
    # ROUND rounds the DOUBLE product 2.675 * 100, which is exactly 267.5, up.
    ("ROUND(x, 2)", 7): 2.68,
    ("x % y", 11): None,  # |x / y| ~ 2e19 >= 2^52: no digits of the remainder are left
    ("x % y", 14): None,  # |x / y| = 4e17 >= 2^52
    ("EXP(x)", 4): math.exp(700), ("EXP(x)", 6): math.exp(-700), ("EXP(x)", 11): math.exp(700),
    ("EXP(-x)", 4): math.exp(-700), ("EXP(-x)", 6): math.exp(700), ("EXP(-x)", 11): math.exp(-700),
    ("EXP(x)", 14): math.exp(700), ("EXP(-x)", 14): math.exp(-700),
}
# GREATEST and LEAST are NULL when any argument is NULL (DuckDB skips NULLs): the rows with a NULL
# among the arguments but a value among the others, taken from ROWS.
COLUMNS = [name for name in SCHEMA]
for term, arguments in (("GREATEST(a, b, x)", ("a", "b", "x")), ("LEAST(x, y)", ("x", "y"))):
    for row in ROWS:
        values = [row[COLUMNS.index(name)] for name in arguments]
        if None in values and any(value is not None for value in values):
            NATIVE_DIFFERS[(term, row[0])] = None
# LN(x) / LN(10) instead of LOG10, and DOUBLE instead of DuckDB's exact DECIMAL literal 0.3.
LAST_DIGITS = {"LOG10(x)", "LOG(2, x)", "LOG(y, x)", "-a * 0.3"}


def test_keeps_duckdbs_own_answers(duckdb_rows):
    hardened = cells(duckdb_rows)
    connection = duckdb.connect()
    connection.execute(create_table("duckdb"))
    connection.executemany("INSERT INTO edge VALUES (?, ?, ?, ?, ?, ?, ?)", ROWS)
    failed = set()
    for term, _ in TERMS:
        as_written = exp.cast(sqlglot.parse_one(term, dialect="duckdb"), "DOUBLE")
        statement = exp.select(column("id"), as_written).from_(exp.to_table("edge")).order_by(column("id"))
        try:
            native = dict(connection.execute(render(statement, "duckdb")).fetchall())
        except duckdb.Error:
            failed.add(term)
            continue
        for row_id, value in native.items():
            ours = hardened[(term, row_id)]
            if (term, row_id) in NATIVE_DIFFERS:
                assert ours == NATIVE_DIFFERS[(term, row_id)], (term, row_id)
            elif value is not None and not math.isfinite(value):
                assert ours is None, (term, row_id, value)  # inf or NaN in DuckDB: NULL
            elif term in LAST_DIGITS and value is not None:
                assert ours == pytest.approx(value, rel=1e-15, abs=0), (term, row_id)
            else:
                assert ours == value, (term, row_id)
    assert failed == set(NATIVE_FAILS)


def test_input_tree_is_not_changed_and_quoting_is_kept():
    parsed = sqlglot.parse_one('"Monthly Payment" / NULLIF(revenue, 0) + LN(x) + IF(flag, 1, 0)', dialect="duckdb")
    before = repr(parsed)
    hardened = harden(parsed, SCHEMA)
    assert repr(parsed) == before
    assert all(node.parent is not None for node in parsed.walk() if node is not parsed)
    assert '"Monthly Payment"' in hardened.sql(dialect="duckdb")  # quoted as written
    assert "revenue" in hardened.sql(dialect="duckdb")  # unquoted as written


def test_existing_guard_is_not_doubled():
    hardened = harden(sqlglot.parse_one("a / NULLIF(b, 0)", dialect="duckdb"))
    assert hardened.sql(dialect="duckdb") == "CAST(a AS DOUBLE) / NULLIF(CAST(b AS DOUBLE), CAST(0 AS DOUBLE))"


def test_substituted_trees_keep_their_precedence():
    # % and ROUND become sums and products: without parentheses 2 * (a % b) would read 2 * a - ...
    hardened = harden(sqlglot.parse_one("2 * (a % b) - ROUND(x) * 3", dialect="duckdb"))
    reparsed = sqlglot.parse_one(hardened.sql(dialect="duckdb"), dialect="duckdb")
    assert isinstance(reparsed, exp.Sub) and isinstance(reparsed.this, exp.Mul) and isinstance(reparsed.expression, exp.Mul)


def test_boolean_columns_come_from_the_schema_or_from_sqlglot_types():
    # PostgreSQL cannot CAST a BOOLEAN to DOUBLE, so a boolean column must become 1.0/0.0 (measured on PostgreSQL 15).
    one_zero = 'CASE WHEN "Flag" THEN CAST(1.0 AS DOUBLE) WHEN NOT ("Flag") THEN CAST(0.0 AS DOUBLE) END * CAST(2 AS DOUBLE)'
    parsed = sqlglot.parse_one('"Flag" * 2', dialect="duckdb")
    assert render(harden(parsed, {"flag": "BOOLEAN"}), "duckdb", pretty=False) == one_zero  # names match without case
    typed = parsed.copy()
    typed.find(exp.Column).type = "BOOLEAN"  # as sqlglot's annotate_types leaves it
    assert render(harden(typed), "duckdb", pretty=False) == one_zero
    assert render(harden(parsed), "duckdb", pretty=False) == 'CAST("Flag" AS DOUBLE) * CAST(2 AS DOUBLE)'


def test_as_number_casts_only_what_is_not_a_double_yet():
    ratio = harden(sqlglot.parse_one("a / b", dialect="duckdb"))
    assert as_number(ratio, False).sql(dialect="duckdb") == ratio.sql(dialect="duckdb")
    indicator = harden(sqlglot.parse_one("CASE WHEN a < 2 THEN 1 ELSE 0 END", dialect="duckdb"))
    assert as_number(indicator, False).sql(dialect="duckdb") == "CAST(CASE WHEN a < 2 THEN 1 ELSE 0 END AS DOUBLE)"
    assert as_number(column("young"), True).sql(dialect="duckdb") == (
        'CASE WHEN "young" THEN CAST(1.0 AS DOUBLE) WHEN NOT ("young") THEN CAST(0.0 AS DOUBLE) END')
