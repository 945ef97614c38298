"""Labelled batches for `featpipe evaluate`: the period of each row, and the evaluation table.

The evaluation table is the model's design query run over the labelled table, with every row marked
held out and one flag column per period (`_in_1`, `_in_2`, ...). The holdout metric queries read the
rows whose holdout flag is set, so pointing a layout's holdout at a period's flag measures that
period with exactly the queries that measure the holdout.

    >>> print(period_expression("month_of(signed_on)", {"signed_on": "DATE"}).sql("duckdb", identify=True))
    EXTRACT(YEAR FROM "signed_on") * 100 + EXTRACT(MONTH FROM "signed_on")
"""

from __future__ import annotations

import datetime
import re
from collections.abc import Mapping, Sequence
from decimal import Decimal

from sqlglot import exp

from ..compiler import CompiledModel
from ..errors import FeatpipeError
from ..project import InputSpec
from ..project.names import table_reference
from .common import alias, column, number
from .design import design_query

MONTH_OF = re.compile(r"month_of\(\s*([A-Za-z][A-Za-z0-9_]*)\s*\)")
PERIOD = "_period"


def period_flag(index: int) -> str:
    """The evaluation table's column that marks the rows of the `index`-th period (from 1)."""
    return f"_in_{index}"


def period_expression(by: str, columns: Mapping[str, str]) -> exp.Expression:
    """The period of a row: a column's value, or for `month_of(col)` (a date column) year * 100 + month.

    Refuses a column the table does not declare, and month_of over a column that is not a date.
    """
    month = MONTH_OF.fullmatch(by.strip())
    name = month.group(1) if month else by.strip()
    if name not in columns:
        raise FeatpipeError(f"--by {by}: '{name}' is not a declared column of the table; use one of {', '.join(sorted(columns))}")
    if not month:
        return column(name)
    if not exp.DataType.build(columns[name], dialect="duckdb").is_type(*exp.DataType.TEMPORAL_TYPES):
        raise FeatpipeError(f"--by {by}: month_of needs a date or timestamp column, and '{name}' is {columns[name]}; "
                            f"pass --by {name} to batch by its values")
    year = exp.Extract(this=exp.var("YEAR"), expression=column(name))
    month_number = exp.Extract(this=exp.var("MONTH"), expression=column(name))
    return exp.Add(this=exp.Mul(this=year, expression=exp.Literal.number(100)), expression=month_number)


def periods_query(period: exp.Expression, table: str) -> exp.Select:
    """The distinct non-NULL periods of `table`, in order."""
    return (
        exp.select(alias(period.copy(), PERIOD))
        .distinct()
        .from_(table_reference(table, "--table"))
        .where(period.copy().is_(exp.null()).not_())
        .order_by(column(PERIOD))
    )


def row_count_query(table: str) -> exp.Select:
    return exp.select(exp.Count(this=exp.Star())).from_(exp.to_table(table))


def period_label(value, by: str) -> str:
    """A period as the evaluation file names it: 2025-07 for month_of, else the value as text."""
    if isinstance(value, Decimal):
        value = int(value) if value == value.to_integral_value() else float(value)
    if MONTH_OF.fullmatch(by.strip()):
        return f"{int(value) // 100:04d}-{int(value) % 100:02d}"
    if isinstance(value, (datetime.date, datetime.datetime)):
        return value.isoformat()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def period_literal(value) -> exp.Expression:
    """`value` (as an engine returned it) as a SQL literal to compare the period with."""
    if isinstance(value, bool):
        return exp.true() if value else exp.false()
    if isinstance(value, datetime.datetime):
        return exp.cast(exp.Literal.string(value.isoformat(sep=" ")), exp.DataType.build("TIMESTAMP"))
    if isinstance(value, datetime.date):
        return exp.cast(exp.Literal.string(value.isoformat()), exp.DataType.build("DATE"))
    if isinstance(value, (int, float, Decimal)):
        return number(float(value))
    return exp.Literal.string(str(value))


def evaluation_query(model: CompiledModel, source: InputSpec, table: str, period: exp.Expression | None,
                     periods: Sequence) -> exp.Select:
    """The design query over `table` with every row held out, plus one flag per period in `periods`."""
    query = design_query(model, source, table)
    for projection in query.expressions:
        if projection.alias == model.layout.holdout:
            projection.set("this", exp.true())
    for index, value in enumerate(periods, start=1):
        same = exp.EQ(this=period.copy(), expression=period_literal(value))
        query.select(alias(exp.Coalesce(this=same, expressions=[exp.false()]), period_flag(index)), copy=False)
    return query
