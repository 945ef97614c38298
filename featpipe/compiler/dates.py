"""The date functions a term may use: days between two dates and a date's year, month, day and ISO weekday.

Each is deterministic and gives a whole number that every engine computes alike once rendered for it
(sqlgen/dates.py): `DATE_DIFF('day', start, end)` (also spelled DATEDIFF) counts the days from start
to end, `YEAR(d)`, `MONTH(d)`, `DAY(d)` and `ISODOW(d)` (Monday = 1 .. Sunday = 7) read a part, and
`EXTRACT(YEAR | MONTH | DAY | ISODOW FROM d)` is another spelling of the same parts. A date literal
is written `DATE 'YYYY-MM-DD'`. Other units and parts are refused with what to write instead: engines
count months between dates, number weekdays and weeks differently.

Example:
    >>> import sqlglot
    >>> date_problem(sqlglot.parse_one("DATE_DIFF('month', a, b)", dialect="duckdb"))
    "DATE_DIFF counts only days here: engines count months and years between two dates differently; write DATE_DIFF('day', start, end), or compare YEAR(d) and MONTH(d)"
    >>> as_part_function(sqlglot.parse_one("EXTRACT(isodow FROM d)", dialect="duckdb")).sql(dialect="duckdb")
    'ISODOW(d)'
"""

from __future__ import annotations

import datetime
import re

from sqlglot import exp

# The date parts a term may read, by the name EXTRACT uses, as the function node that also spells them.
PARTS: dict[str, type[exp.Func]] = {"YEAR": exp.Year, "MONTH": exp.Month, "DAY": exp.Day, "ISODOW": exp.DayOfWeekIso}
PART_FUNCTIONS = tuple(PARTS.values())
DATE_FUNCTIONS = (exp.DateDiff, *PART_FUNCTIONS)
LISTED = "DATE_DIFF('day', start, end), YEAR, MONTH, DAY, ISODOW"
_WEEKDAY_PARTS = {"DOW", "DAYOFWEEK", "WEEKDAY"}
_ISO_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")

UNIT = ("DATE_DIFF counts only days here: engines count months and years between two dates differently; "
        "write DATE_DIFF('day', start, end), or compare YEAR(d) and MONTH(d)")
WEEKDAY = "{name} numbers weekdays differently by engine (Sunday is 0 on some, 1 on others); write ISODOW(d): Monday = 1 .. Sunday = 7"
PART = "EXTRACT({part} FROM ...) is not allowed: featpipe reads only YEAR, MONTH, DAY and ISODOW of a date alike on every engine"
LITERAL = "{text} is not a date; write a date literal as DATE 'YYYY-MM-DD', e.g. DATE '2024-02-29'"
CAST = ("CAST to DATE is allowed only for a literal, DATE 'YYYY-MM-DD' (engines read other text as dates differently); "
        "declare a date column as DATE in featpipe.yaml")


def date_problem(node: exp.Expression) -> str | None:
    """Why an otherwise allowed date node is refused (None when it is fine)."""
    if isinstance(node, exp.DateDiff):
        unit = node.args.get("unit")
        return None if unit is not None and unit.name.upper() == "DAY" else UNIT
    if isinstance(node, exp.DayOfWeek):
        return WEEKDAY.format(name="DAYOFWEEK(d)")
    if isinstance(node, exp.Extract):
        part = node.this.name.upper()
        if part in _WEEKDAY_PARTS:
            return WEEKDAY.format(name=f"EXTRACT({part} FROM d)")
        return None if part in PARTS else PART.format(part=part)
    return None


def is_date_literal(node: exp.Expression) -> bool:
    """Whether `node` is CAST('YYYY-MM-DD' AS DATE), as DATE '...' parses: a real calendar day."""
    if not (isinstance(node, exp.Cast) and node.to.is_type(exp.DataType.Type.DATE)):
        return False
    text = node.this
    if not (isinstance(text, exp.Literal) and text.is_string and _ISO_DATE.fullmatch(text.this)):
        return False
    try:
        datetime.date.fromisoformat(text.this)
    except ValueError:
        return False
    return True


def literal_problem(node: exp.Cast) -> str:
    """Why a CAST to DATE is refused: only a DATE 'YYYY-MM-DD' literal of a real day is a date in a term."""
    if isinstance(node.this, exp.Literal) and node.this.is_string:
        return LITERAL.format(text=f"DATE '{node.this.this}'")
    return CAST


def as_part_function(node: exp.Expression) -> exp.Expression:
    """EXTRACT(part FROM d) as the function of that part (YEAR(d), ...); any other node as it is.

    One spelling per meaning: the canonical form and the renderers see only the functions.
    """
    if isinstance(node, exp.Extract) and node.this.name.upper() in PARTS:
        return PARTS[node.this.name.upper()](this=node.expression)
    return node
