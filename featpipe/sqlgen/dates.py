"""Date functions rendered per engine: sqlglot's own rendering of some is wrong for some engines.

Terms hold `DATE_DIFF('day', a, b)`, `YEAR(d)`, `MONTH(d)`, `DAY(d)` and `ISODOW(d)` (compiler/dates.py).
sqlglot writes DATE_DIFF correctly for every engine featpipe runs on (PostgreSQL subtracts dates,
Spark has DATEDIFF, SQLite subtracts JULIANDAY values) and YEAR, MONTH and DAY for DuckDB, PostgreSQL
and Spark, but passes YEAR(d) to SQLite, which has no such function, writes DAYOFWEEK_ISO(d) for
PostgreSQL and SQLite, which have none, and `(DAYOFWEEK(d) % 7) + 1` for Spark, which makes Sunday 2
(Spark's DAYOFWEEK counts from Sunday = 1). Those are replaced here by trees of our own, just before
rendering: PostgreSQL `EXTRACT(ISODOW FROM d)`, Spark `WEEKDAY(d) + 1` (WEEKDAY counts from
Monday = 0), SQLite `CAST(STRFTIME('%Y', d) AS INTEGER)` for the parts and
`(CAST(STRFTIME('%w', d) AS INTEGER) + 6) % 7 + 1` for the weekday (%w counts from Sunday = 0).
Each is checked against Python's datetime on the engines themselves by tests/test_dates.py.

Example:
    >>> import sqlglot
    >>> for_dialect(sqlglot.parse_one("ISODOW(d) + YEAR(d)", dialect="duckdb"), "sqlite").sql(dialect="sqlite")
    "((CAST(STRFTIME('%w', d) AS INTEGER) + 6) % 7 + 1) + CAST(STRFTIME('%Y', d) AS INTEGER)"
"""

from __future__ import annotations

from sqlglot import exp

from ..compiler.dates import PART_FUNCTIONS

_STRFTIME_FORMATS = {exp.Year: "%Y", exp.Month: "%m", exp.Day: "%d"}


def for_dialect(statement: exp.Expression, dialect: str) -> exp.Expression:
    """`statement` with every date part written as `dialect` computes it (the same tree when none needs it)."""
    rewrite = _REWRITES.get(dialect)
    if rewrite is None or statement.find(*PART_FUNCTIONS) is None:
        return statement
    statement = statement.copy()
    for node in reversed(list(statement.walk())):  # innermost first: a part's argument may hold another part
        if isinstance(node, PART_FUNCTIONS):
            replacement = rewrite(node)
            if replacement is not node:
                if node is statement:
                    statement = replacement
                else:
                    node.replace(replacement)
    return statement


def _postgres(node: exp.Expression) -> exp.Expression:
    if isinstance(node, exp.DayOfWeekIso):
        return exp.Extract(this=exp.var("ISODOW"), expression=node.this)
    return node


def _spark(node: exp.Expression) -> exp.Expression:
    if isinstance(node, exp.DayOfWeekIso):
        return exp.Paren(this=exp.Add(this=exp.Anonymous(this="WEEKDAY", expressions=[node.this]), expression=exp.Literal.number(1)))
    return node


def _sqlite(node: exp.Expression) -> exp.Expression:
    if isinstance(node, exp.DayOfWeekIso):
        sunday_zero = _strftime("%w", node.this)
        monday_zero = exp.Mod(this=exp.Paren(this=exp.Add(this=sunday_zero, expression=exp.Literal.number(6))),
                              expression=exp.Literal.number(7))
        return exp.Paren(this=exp.Add(this=monday_zero, expression=exp.Literal.number(1)))
    return _strftime(_STRFTIME_FORMATS[type(node)], node.this)


def _strftime(pattern: str, date: exp.Expression) -> exp.Expression:
    return exp.cast(exp.Anonymous(this="STRFTIME", expressions=[exp.Literal.string(pattern), date]), exp.DataType.build("INT"))


_REWRITES = {"postgres": _postgres, "spark": _spark, "sqlite": _sqlite}
