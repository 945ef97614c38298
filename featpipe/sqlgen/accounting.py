"""Row accounting of a design table: how many rows train, are held out, or are dropped and why."""

from __future__ import annotations

from sqlglot import exp

from ..compiler.layout import DesignLayout
from .common import alias, column, complete_rows, holdout_rows, training_rows


def _count_where(condition: exp.Expression) -> exp.Expression:
    return exp.func("SUM", exp.Case().when(condition, exp.Literal.number(1)).else_(exp.Literal.number(0)))


def _is_null(name: str) -> exp.Expression:
    return column(name).is_(exp.null())


def dropped_reasons(layout: DesignLayout) -> list[tuple[str, str]]:
    """(reason, column) pairs, in the order rows are counted: target, offset, weight, then each term."""
    reasons = [("null target", layout.target)]
    if layout.offset:
        reasons.append(("null offset", layout.offset))
    if layout.weight:
        reasons.append(("null weight", layout.weight))
    reasons += [(f"null term {term}", term) for term in layout.terms]
    return reasons


def row_accounting_query(layout: DesignLayout) -> exp.Select:
    """One pass: all rows, complete rows, training and holdout rows, and rows NULL in each column.

    A row NULL in several columns counts once under each of them; `incomplete` counts it once.
    """
    projections = [
        alias(exp.Count(this=exp.Star()), "rows"),
        alias(_count_where(exp.not_(complete_rows(layout))), "incomplete"),
        alias(_count_where(training_rows(layout)), "train"),
        alias(_count_where(holdout_rows(layout)), "holdout"),
    ]
    projections += [alias(_count_where(_is_null(name)), f"null_{index}") for index, (_, name) in enumerate(dropped_reasons(layout))]
    return exp.select(*projections).from_(exp.to_table(layout.table))
