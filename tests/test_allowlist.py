"""The allow-list pass: each kind of SQL a term may not use is reported where it stands, saying what to do.

Term files are parsed whole in the duckdb dialect, as the compiler does, so the positions are those
of the file: `line:col` is the first character of the offending token (sqlglot itself records the
column where a token ends). Which constructs each engine accepts or answers differently is measured on the engines by
tests/test_harden.py.
"""

from __future__ import annotations

import pytest
import sqlglot
from sqlglot import exp

from featpipe.compiler.allowlist import check_allowed
from featpipe.compiler.parse import parse_term_file

FILE = "terms/probe.sql"
TERM_FILE = """\
-- Terms for a test.
SELECT
  monthly_payment / 2 AS fine,
  {probe} AS probe
FROM leases
"""

_ROW = "a term is computed from one row of its input"
SUBQUERY = f"a subquery (SELECT ...) is not allowed in a term: {_ROW}; join what you need into the input table before featpipe reads it"
RANDOM = "{} is not deterministic: training and scoring would differ; for a random split use the model's holdout setting"
CLOCK = "{} depends on when it runs: training and scoring would differ; store the date or time as an input column"
READER = "{} reads outside the row (files, settings or the environment): a term may use only the columns of its own row"
AGGREGATE = "{} is an aggregate: aggregates summarize many rows; a term is computed from one row. Compute it upstream as an input column"
FUNCTIONS = ("ABS, CEIL, COALESCE, EXP, FLOOR, GREATEST, LEAST, LENGTH, LN, LOG(base, x), LOG10, LOWER, NULLIF, "
             "POWER, ROUND, SIGN, SQRT, TRIM, UPPER")
UNKNOWN = ("{} is not on featpipe's list of portable deterministic functions; use " + FUNCTIONS
           + ", the date functions DATE_DIFF('day', start, end), YEAR, MONTH, DAY, ISODOW, CASE or CAST")
OTHER = ("{} is not allowed in a term: featpipe accepts only portable deterministic scalar SQL (columns, literals, "
         "arithmetic, comparisons, AND/OR/NOT, IS NULL, BETWEEN, IN (...), CASE, CAST and the functions " + FUNCTIONS + ")")


def problems(probe: str) -> list[str]:
    """`line:col: message` of every problem in the probe term, written on line 4 from column 3."""
    select = sqlglot.parse(TERM_FILE.format(probe=probe), dialect="duckdb")[0]
    return [f"{d.line}:{d.col}: {d.message}" for d in check_allowed(select.expressions[1].this, FILE)]


REJECTED = [
    # subqueries: reported once, at the first positioned token inside
    ("(SELECT MAX(amount) FROM leases)", ["4:15: " + SUBQUERY]),
    ("EXISTS (SELECT 1 FROM leases)",
     [f"4:18: EXISTS (SELECT ...) runs a subquery: {_ROW}; join what you need into the input table before featpipe reads it"]),
    ("x IN (SELECT x FROM leases)", [f"4:3: IN (SELECT ...) runs a subquery: {_ROW}; list the values instead, e.g. x IN (1, 2, 3)"]),
    # aggregates and windows
    ("SUM(amount)", ["4:3: " + AGGREGATE.format("SUM")]),
    ("count(*) + 1", ["4:3: " + AGGREGATE.format("COUNT")]),
    ("AVG(x) OVER (PARTITION BY y)",
     [f"4:3: window functions (OVER ...) read other rows: {_ROW}; remove OVER (...) or compute it upstream as an input column"]),
    # not deterministic; NOW() is exp.Anonymous in the duckdb dialect, RANDOM() is exp.Rand
    ("x / 2 + random()", ["4:11: " + RANDOM.format("RANDOM()")]),
    ("RAND() + UUID()", ["4:3: " + RANDOM.format("RANDOM()"), "4:12: " + RANDOM.format("UUID()")]),
    ("nextval('seq')", ["4:3: " + RANDOM.format("NEXTVAL()")]),
    ("NOW()", ["4:3: " + CLOCK.format("NOW()")]),
    ("today()", ["4:3: " + CLOCK.format("CURRENT_DATE")]),
    # bare CURRENT_DATE / CURRENT_TIMESTAMP carry no position: the enclosing expression's is used
    ("x + current_timestamp", ["4:3: " + CLOCK.format("CURRENT_TIMESTAMP")]),
    # reading outside the row
    ("read_csv('f.csv')", ["4:3: " + READER.format("READ_CSV")]),
    ("read_parquet('f.parquet')", ["4:3: " + READER.format("READ_PARQUET")]),
    ("getenv('HOME')", ["4:3: " + READER.format("GETENV")]),
    ("current_setting('work_mem')", ["4:3: " + READER.format("CURRENT_SETTING")]),
    ("x + pg_read_file('/etc/hosts')", ["4:7: " + READER.format("PG_READ_FILE")]),
    # not portable
    ("LOG(x)", ["4:3: LOG(x) with one argument is ambiguous: log10 in DuckDB/PostgreSQL, natural log in Spark; write LN(x) or LOG10(x)"]),
    ("a // b", ["4:3: // is integer division only in DuckDB; write a / b, or FLOOR(a / b) for a whole number"]),
    ("foo(x)", ["4:3: " + UNKNOWN.format("FOO")]),
    ("trunc(x)", ["4:3: " + UNKNOWN.format("TRUNC")]),
    ("FOO(RANDOM())", ["4:3: " + UNKNOWN.format("FOO"), "4:7: " + RANDOM.format("RANDOM()")]),
    ("CAST(x AS DATE)",
     ["4:8: CAST to DATE is allowed only for a literal, DATE 'YYYY-MM-DD' (engines read other text as dates differently); "
      "declare a date column as DATE in featpipe.yaml"]),
    ("CAST(x AS REAL)", ["4:8: CAST to REAL is a 4-byte float in DuckDB and PostgreSQL but 8 bytes in SQLite; write CAST(x AS DOUBLE)"]),
    ("x IN (1, y)", ["4:3: IN takes a list of literal values here, e.g. x IN (1, 2, 3); compare with other columns using = and OR"]),
    ("x IS TRUE", ["4:3: x IS TRUE is not allowed: IS is allowed only as IS NULL or IS NOT NULL; for x IS TRUE write COALESCE(x, FALSE)"]),
    ("ROUND(x, y)", ["4:3: ROUND's second argument must be a whole-number literal, e.g. ROUND(x, 2)"]),
    ("s LIKE 'a%'", ["4:3: " + OTHER.format("s LIKE 'a%'")]),
    ("leases.*", ["4:3: * is not a term value: name each column"]),
    ("(SELECT 1) + now()", ["4:11: " + SUBQUERY, "4:16: " + CLOCK.format("NOW()")]),
]


@pytest.mark.parametrize("probe, expected", REJECTED, ids=[probe for probe, _ in REJECTED])
def test_rejected(probe, expected):
    assert problems(probe) == expected


ALLOWED = [
    "monthly_payment / NULLIF(monthly_revenue, 0)",
    "CASE WHEN firm_age_years < 2 THEN 1 ELSE 0 END",
    "CASE region WHEN 'north' THEN 1.5 WHEN 'south' THEN -2 END",
    "IF(x > 1 AND NOT y <= 0 OR z IS NULL, 1, 0)",
    "x % 3 + -y * 2.5e-3 - (a - b)",
    "x BETWEEN 1 AND 10 AND s IN ('a', 'b') AND n NOT IN (1, -2, NULL) AND t IS NOT NULL",
    "ABS(x) + SIGN(x) + LN(x) + LOG10(x) + LOG(2, x) + EXP(x) + SQRT(x) + POWER(x, 2) + POW(x, 0.5) + x ^ 2",
    "LEAST(x, y) + GREATEST(x, 0) + ROUND(x) + ROUND(x, -2) + FLOOR(x) + CEIL(x) + CEILING(x)",
    "COALESCE(x, 0) + NULLIF(y, 0)",
    "LOWER(TRIM(s)) = 'north' OR UPPER(s) <> 'X' OR LENGTH(s) > 3",
    "CAST(x AS DOUBLE) + TRY_CAST(s AS INTEGER) + CAST(x AS DECIMAL(10, 2)) + x::BIGINT",
    "CAST(flag AS BOOLEAN) AND CAST(x AS VARCHAR) = '1' AND TRUE",
    '"Order" * leases.x',
]


@pytest.mark.parametrize("probe", ALLOWED)
def test_allowed(probe):
    assert problems(probe) == []


def test_positions_on_later_lines_point_at_the_token_start():
    text = "SELECT\n  CASE\n    WHEN x > 0 THEN now()\n    ELSE \"Quoted Name\" + getenv('X')\n  END AS t\nFROM leases"
    select = sqlglot.parse(text, dialect="duckdb")[0]
    found = [(d.line, d.col, d.message.split(" ")[0]) for d in check_allowed(select.expressions[0].this, FILE)]
    # line 3: 4 spaces, "WHEN x > 0 THEN " fills columns 5-20; line 4: 4 spaces, 'ELSE ' 5-9,
    # '"Quoted Name"' 10-22, ' + ' 23-25
    assert found == [(3, 21, "NOW()"), (4, 26, "GETENV")]


def test_statement_is_reported():
    drop = sqlglot.parse("DROP TABLE leases", dialect="duckdb")[0]
    assert isinstance(drop, exp.Drop)
    [problem] = check_allowed(drop, FILE)
    assert str(problem) == (f"{FILE}:1:12: DROP is a statement, not an expression: "
                            "a term file holds one SELECT whose projections are the terms")
    [problem] = check_allowed(sqlglot.parse("DELETE FROM leases", dialect="duckdb")[0], FILE)
    assert problem.message.startswith("DELETE is a statement")


def test_join_and_table_nodes_are_reported():
    select = sqlglot.parse("SELECT a FROM leases JOIN firms ON leases.id = firms.id", dialect="duckdb")[0]
    [problem] = check_allowed(select.args["joins"][0], FILE)
    assert (problem.line, problem.col) == (1, 27)
    assert problem.message == (f"a join is not allowed in a term: {_ROW}; join the tables into the input before featpipe reads it")
    scan = sqlglot.parse("SELECT a FROM read_csv('x.csv')", dialect="duckdb")[0]
    [problem] = check_allowed(scan.args["from_"], FILE)
    assert problem.message == ("FROM READ_CSV('x.csv') reads a table: a term may use only the columns of its own row; "
                               "make the data an input column")


def test_through_the_term_file_parser():
    """The compiler's own parse (identifiers normalized) keeps the positions the pass reports."""
    text = "SELECT\n  -- share\n  Payment / NULLIF(revenue, 0) + SUM(Payment) AS share\nFROM leases\n"
    parsed = parse_term_file(FILE, text)
    [problem] = check_allowed(parsed.terms[0].expression, FILE)
    assert str(problem) == f"{FILE}:3:34: " + AGGREGATE.format("SUM")
