"""Row accounting: how many rows of a design table train, are held out, or are dropped and why; and
how many rows of the input a term gives a value although an input column it reads is NULL."""

from __future__ import annotations

from sqlglot import exp

from ..compiler import Term
from ..compiler.layout import DesignLayout
from ..project import InputSpec
from .common import alias, column, complete_rows, count_if, holdout_rows, null_count, training_rows
from .design import term_value


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
        alias(count_if(exp.not_(complete_rows(layout))), "incomplete"),
        alias(count_if(training_rows(layout)), "train"),
        alias(count_if(holdout_rows(layout)), "holdout"),
    ]
    projections += [alias(null_count(column(name)), f"null_{index}") for index, (_, name) in enumerate(dropped_reasons(layout))]
    return exp.select(*projections).from_(exp.to_table(layout.table))


def imputing_terms(terms: list[Term]) -> list[Term]:
    """The terms that could have a value on a row missing one of their inputs (a CASE ... ELSE or
    COALESCE does that); an input column used as a term is missing exactly when the column is."""
    return [term for term in terms if term.columns and not isinstance(term.inlined, exp.Column)]


def imputed_rows_query(terms: list[Term], source: InputSpec) -> exp.Select:
    """One pass over the input: per term, the rows where it is not NULL while a column it reads is."""
    projections = []
    for index, term in enumerate(terms):
        missing_input = exp.or_(*(column(name).is_(exp.null()) for name in term.columns))
        filled = exp.and_(term_value(term, source).is_(exp.null()).not_(), missing_input)
        projections.append(alias(count_if(filled), f"imputed_{index}"))
    return exp.select(*projections).from_(exp.to_table(source.name))
