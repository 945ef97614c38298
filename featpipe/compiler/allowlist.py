"""Allow-list pass: a term may only be deterministic scalar SQL that every engine computes alike.

The check is an allow-list of node types, not a deny-list: sqlglot parses an unknown function as
`exp.Anonymous` (in the duckdb dialect even ``NOW()``), so anything not listed here is rejected.
Known dangerous kinds (subqueries, aggregates, windows, randomness, clocks, readers of files,
settings or the environment, one-argument LOG, ``//``, numbers no engine reads) get their own message
saying what to do.

Example:
    >>> import sqlglot
    >>> [term] = sqlglot.parse("SELECT x / 2 + random() AS t FROM leases", dialect="duckdb")[0].expressions
    >>> for problem in check_allowed(term.this, "terms/a.sql"):
    ...     print(problem)
    terms/a.sql:1:16: RANDOM() is not deterministic: training and scoring would differ; for a random split use the model's holdout setting
    >>> check_allowed(sqlglot.parse_one("LN(x) > 0", dialect="duckdb"), "terms/a.sql")
    []
"""

from __future__ import annotations

import math

from sqlglot import exp

from ..errors import Diagnostic
from .dates import DATE_FUNCTIONS, LISTED, date_problem, is_date_literal, literal_problem

# Nodes allowed as they are; their children are checked in turn.
_ALLOWED = (
    exp.Column, exp.Identifier, exp.Literal, exp.Boolean, exp.Null, exp.Paren,
    exp.Add, exp.Sub, exp.Mul, exp.Div, exp.Mod, exp.Neg,
    exp.EQ, exp.NEQ, exp.GT, exp.GTE, exp.LT, exp.LTE, exp.And, exp.Or, exp.Not, exp.Between,
    exp.Case, exp.If, exp.Coalesce, exp.Nullif,
    exp.Abs, exp.Sign, exp.Ln, exp.Exp, exp.Sqrt, exp.Pow, exp.Least, exp.Greatest, exp.Floor, exp.Ceil,
    exp.Lower, exp.Upper, exp.Trim, exp.Length, *DATE_FUNCTIONS,
)
_FUNCTIONS = ("ABS, CEIL, COALESCE, EXP, FLOOR, GREATEST, LEAST, LENGTH, LN, LOG(base, x), LOG10, LOWER, NULLIF, "
              "POWER, ROUND, SIGN, SQRT, TRIM, UPPER")

# The most digits a number in a term may have: DECIMAL's largest precision in DuckDB and Spark; DuckDB
# cannot read a longer integer literal at all.
MAX_NUMBER_DIGITS = 38

_INTEGER_CASTS = {exp.DataType.Type.TINYINT, exp.DataType.Type.SMALLINT, exp.DataType.Type.INT, exp.DataType.Type.BIGINT}
_FOUR_BYTE_FLOATS = {exp.DataType.Type.FLOAT}  # the duckdb dialect reads both FLOAT and REAL as this type

_STATEMENTS = (
    exp.DDL, exp.DML, exp.Drop, exp.Alter, exp.Command, exp.Set, exp.Pragma, exp.Use, exp.Transaction,
    exp.Commit, exp.Rollback, exp.Describe, exp.Show, exp.Attach, exp.Detach, exp.Cache, exp.Uncache,
    exp.Refresh, exp.LoadData, exp.Grant, exp.Revoke, exp.Analyze, exp.TruncateTable, exp.Install,
    exp.Export, exp.Summarize,
)
_CLOCKS = (
    exp.CurrentDate, exp.CurrentDatetime, exp.CurrentTime, exp.CurrentTimestamp, exp.CurrentTimestampLTZ,
    exp.Localtime, exp.Localtimestamp, exp.Systimestamp, exp.UtcTime, exp.UtcTimestamp,
)
# Every other CURRENT_* node (user, schema, database, role, version, time zone, ...) reads the session.
_SESSION = tuple(
    kind for name, kind in vars(exp).items()
    if name.startswith("Current") and isinstance(kind, type) and issubclass(kind, exp.Func) and kind not in _CLOCKS
)
_RANDOM = (exp.Rand, exp.Randn, exp.Randstr, exp.Uuid)
_READERS = (exp.ReadCSV, exp.ReadParquet)

# Names of functions sqlglot leaves as exp.Anonymous, by why they are rejected.
_RANDOM_NAMES = {"RANDOM", "RAND", "UUID", "GEN_RANDOM_UUID", "RANDOM_UUID", "UUIDV4", "UUIDV7", "SETSEED",
                 "NEXTVAL", "CURRVAL"}
_CLOCK_NAMES = {"NOW", "GET_CURRENT_TIME", "GET_CURRENT_TIMESTAMP", "TRANSACTION_TIMESTAMP", "STATEMENT_TIMESTAMP",
                "CLOCK_TIMESTAMP", "TIMEOFDAY", "GETDATE", "SYSDATE", "UNIX_TIMESTAMP"}
_READER_NAMES = {"GETENV", "CURRENT_SETTING", "SET_CONFIG", "PG_LS_DIR",
                 "PG_STAT_FILE", "LO_IMPORT", "LO_EXPORT", "PARQUET_SCAN", "GLOB", "DBLINK", "LOAD_EXTENSION",
                 "INPUT_FILE_NAME", "INET_CLIENT_ADDR", "PG_BACKEND_PID", "SESSION_USER", "USER"}
_READER_PREFIXES = ("READ_", "CURRENT_", "DUCKDB_", "PG_READ_")

_ROW = "a term is computed from one row of its input"
SUBQUERY = f"a subquery (SELECT ...) is not allowed in a term: {_ROW}; join what you need into the input table before featpipe reads it"
EXISTS = f"EXISTS (SELECT ...) runs a subquery: {_ROW}; join what you need into the input table before featpipe reads it"
IN_SUBQUERY = f"IN (SELECT ...) runs a subquery: {_ROW}; list the values instead, e.g. x IN (1, 2, 3)"
JOIN = f"a join is not allowed in a term: {_ROW}; join the tables into the input before featpipe reads it"
TABLE = "{name} reads a table: a term may use only the columns of its own row; make the data an input column"
AGGREGATE = "{name} is an aggregate: aggregates summarize many rows; a term is computed from one row. Compute it upstream as an input column"
WINDOW = f"window functions (OVER ...) read other rows: {_ROW}; remove OVER (...) or compute it upstream as an input column"
RANDOM = "{name} is not deterministic: training and scoring would differ; for a random split use the model's holdout setting"
CLOCK = "{name} depends on when it runs: training and scoring would differ; store the date or time as an input column"
READER = "{name} reads outside the row (files, settings or the environment): a term may use only the columns of its own row"
ONE_ARGUMENT_LOG = "LOG(x) with one argument is ambiguous: log10 in DuckDB/PostgreSQL, natural log in Spark; write LN(x) or LOG10(x)"
INTEGER_DIVISION = "// is integer division only in DuckDB; write a / b, or FLOOR(a / b) for a whole number"
UNKNOWN_FUNCTION = ("{name} is not on featpipe's list of portable deterministic functions; use " + _FUNCTIONS
                    + ", the date functions " + LISTED + ", CASE or CAST")
CAST = "CAST to {name} is not allowed in a term: cast to DOUBLE, TINYINT, SMALLINT, INTEGER, BIGINT, DECIMAL(p, s), BOOLEAN or VARCHAR"
FOUR_BYTE_CAST = "CAST to {name} is a 4-byte float in DuckDB and PostgreSQL but 8 bytes in SQLite; write CAST(x AS DOUBLE)"
IN_LIST = "IN takes a list of literal values here, e.g. x IN (1, 2, 3); compare with other columns using = and OR"
IS = "{name} is not allowed: IS is allowed only as IS NULL or IS NOT NULL; for x IS TRUE write COALESCE(x, FALSE)"
ROUND_DIGITS = "ROUND's second argument must be a whole-number literal, e.g. ROUND(x, 2)"
STAR = "* is not a term value: name each column"
LONG_NUMBER = "the number {name} has {digits} digits; a number in a term may have at most " + f"{MAX_NUMBER_DIGITS}: round it"
HUGE_NUMBER = "the number {name} is beyond the range of DOUBLE (about 1.8e308), which every term is computed in; use a smaller number"
STATEMENT = "{name} is a statement, not an expression: a term file holds one SELECT whose projections are the terms"
OTHER = ("{name} is not allowed in a term: featpipe accepts only portable deterministic scalar SQL (columns, literals, "
         "arithmetic, comparisons, AND/OR/NOT, IS NULL, BETWEEN, IN (...), CASE, CAST and the functions " + _FUNCTIONS + ")")


def check_allowed(expression: exp.Expression, file: str) -> list[Diagnostic]:
    """Every node of one term's expression that is not allowed, each with what to do instead.

    Positions are those of the user's file (the tree must come from parsing the whole file).
    """
    found: list[tuple[exp.Expression, str]] = []
    _check(expression, found)
    return sorted(Diagnostic(file, *_position(node), message) for node, message in found)


def _position(node: exp.Expression) -> tuple[int, int]:
    """1-based line and column where `node` starts in its file.

    sqlglot records positions on identifiers, literals and function names only, with `col` at the
    token's last character; nodes without one take their earliest positioned descendant, or else
    their nearest positioned ancestor.
    """
    for scope in (node, *_ancestors(node)):
        metas = [n.meta for n in scope.walk() if "line" in n.meta and "col" in n.meta]
        if metas:
            first = min(metas, key=lambda meta: (meta.get("start", 0), meta["line"], meta["col"]))
            length = first["end"] - first["start"] if "start" in first and "end" in first else 0
            return first["line"], max(1, first["col"] - length)
    return 1, 1


def _ancestors(node: exp.Expression):
    while node.parent is not None:
        node = node.parent
        yield node


def _check(node: exp.Expression, found: list[tuple[exp.Expression, str]]) -> None:
    problem, children = _problem(node)
    if problem:
        found.append((node, problem))
    for child in children:
        _check(child, found)


def _problem(node: exp.Expression) -> tuple[str | None, list[exp.Expression]]:
    """(message or None, the children still to check)."""
    children = list(node.iter_expressions())
    if isinstance(node, exp.Column) and isinstance(node.this, exp.Star) or isinstance(node, exp.Star):
        return STAR, []
    if isinstance(node, exp.Literal) and node.is_number:
        return _number_problem(node), children
    if isinstance(node, (*DATE_FUNCTIONS, exp.Extract, exp.DayOfWeek)):  # the unit or part is a keyword, not a value
        return date_problem(node), [child for child in children if not isinstance(child, exp.Var)]
    if isinstance(node, _ALLOWED):
        if isinstance(node, (exp.Floor, exp.Ceil)) and (node.args.get("decimals") or node.args.get("to")):
            return OTHER.format(name=_show(node)), children
        return None, children
    if isinstance(node, exp.Log):
        return (None if node.expression else ONE_ARGUMENT_LOG), children
    if isinstance(node, exp.Round):
        digits = node.args.get("decimals")
        return (None if digits is None or _whole_number(digits) else ROUND_DIGITS), children
    if isinstance(node, exp.Is):
        return (None if isinstance(node.expression, exp.Null) else IS.format(name=_show(node))), children
    if isinstance(node, exp.In):
        if node.args.get("query"):
            return IN_SUBQUERY, []
        if node.args.get("unnest") or node.args.get("field") or not all(map(_literal, node.expressions)):
            return IN_LIST, [node.this]
        return None, children
    if isinstance(node, (exp.Cast, exp.TryCast)):
        return _cast_problem(node), [node.this]  # the target type is checked here, not as a child
    # Arguments of a rejected scalar function or of // are ordinary expressions worth checking too;
    # inside anything else rejected (a subquery, an aggregate, a window, a statement) they are not.
    passes_on = isinstance(node, (exp.Func, exp.IntDiv)) and not isinstance(node, (exp.AggFunc, exp.Window, exp.Exists))
    return _rejected(node), ([child for child in children if not isinstance(child, exp.Var)] if passes_on else [])


def _rejected(node: exp.Expression) -> str:
    if isinstance(node, _STATEMENTS):
        return STATEMENT.format(name=(node.name if isinstance(node, exp.Command) else node.key).upper())
    if isinstance(node, (exp.Query, exp.Subquery)):
        return SUBQUERY
    if isinstance(node, exp.Exists):
        return EXISTS
    if isinstance(node, exp.Join):
        return JOIN
    if isinstance(node, (exp.From, exp.Table)):
        return TABLE.format(name=_show(node))
    if isinstance(node, exp.Window):
        return WINDOW
    if isinstance(node, exp.AggFunc):
        return AGGREGATE.format(name=node.sql_name())
    if isinstance(node, _RANDOM):
        return RANDOM.format(name=_show(node))
    if isinstance(node, _CLOCKS):
        return CLOCK.format(name=_show(node))
    if isinstance(node, _READERS + _SESSION):
        return READER.format(name=node.sql_name())
    if isinstance(node, exp.IntDiv):
        return INTEGER_DIVISION
    if isinstance(node, exp.Anonymous):
        name = node.name.upper()
        if name in _RANDOM_NAMES:
            return RANDOM.format(name=f"{name}()")
        if name in _CLOCK_NAMES or name.startswith("CURRENT_") and ("DATE" in name or "TIME" in name):
            return CLOCK.format(name=f"{name}()")
        if name in _READER_NAMES or name.startswith(_READER_PREFIXES):
            return READER.format(name=name)
        return UNKNOWN_FUNCTION.format(name=name)
    if isinstance(node, exp.Func):
        return UNKNOWN_FUNCTION.format(name=node.sql_name())
    return OTHER.format(name=_show(node))


def _cast_problem(node: exp.Cast) -> str | None:
    target = node.to
    if any(node.args.get(key) for key in ("format", "default", "action")):
        return OTHER.format(name=_show(node))
    if target.is_type(exp.DataType.Type.DATE) and isinstance(node, exp.Cast):
        return None if is_date_literal(node) else literal_problem(node)
    if target.is_type(*_FOUR_BYTE_FLOATS):
        return FOUR_BYTE_CAST.format(name=target.sql(dialect="duckdb"))
    portable = (
        target.is_type(exp.DataType.Type.DOUBLE, exp.DataType.Type.BOOLEAN, *_INTEGER_CASTS, *exp.DataType.TEXT_TYPES)
        or target.is_type(exp.DataType.Type.DECIMAL) and all(_whole_number(p.this) for p in target.expressions)
    )
    return None if portable else CAST.format(name=target.sql(dialect="duckdb"))


def _number_problem(literal: exp.Literal) -> str | None:
    mantissa = literal.this.lower().partition("e")[0]
    digits = sum(character.isdigit() for character in mantissa)
    if digits > MAX_NUMBER_DIGITS:
        return LONG_NUMBER.format(name=_show(literal, 20), digits=digits)
    if not math.isfinite(float(literal.this)):
        return HUGE_NUMBER.format(name=_show(literal, 20))
    return None


def _whole_number(node: exp.Expression) -> bool:
    if isinstance(node, exp.Neg):
        node = node.this
    return isinstance(node, exp.Literal) and node.is_int


def _literal(node: exp.Expression) -> bool:
    if isinstance(node, exp.Neg):
        node = node.this
    return isinstance(node, (exp.Literal, exp.Boolean, exp.Null))


def _show(node: exp.Expression, limit: int = 60) -> str:
    text = node.sql(dialect="duckdb")
    return text if len(text) <= limit else text[: limit - 3] + "..."
