"""Cross-validation folds of a design table's training rows, assigned by a salted hash of the key.

A row's fold is where the first hex digits of MD5(salt ':folds:' key) fall among k equal ranges,
compared as text like the holdout split, so every engine assigns the same folds. The salt differs
from the holdout's, so folds do not follow the holdout boundary.

    >>> print(fold_number("id", "v1", 2).sql("duckdb", identify=True))
    CASE WHEN SUBSTRING(MD5('v1:folds:' || CAST("id" AS TEXT)), 1, 8) < '80000000' THEN 0 ELSE 1 END
"""

from __future__ import annotations

from sqlglot import exp

from ..compiler.layout import DesignLayout
from .common import alias, column, double, training_rows
from .design import hash_digits, holdout_threshold

FOLD = "_fold"


def fold_number(key: str, salt: str, folds: int) -> exp.Expression:
    """The fold (0 to folds - 1) of a row, from its key."""
    digits = hash_digits(key, f"{salt}:folds")
    case = exp.Case()
    for fold in range(folds - 1):
        case = case.when(exp.LT(this=digits.copy(), expression=exp.Literal.string(holdout_threshold((fold + 1) / folds))),
                         exp.Literal.number(fold))
    return case.else_(exp.Literal.number(folds - 1))


def fold_flag(fold: int) -> str:
    """The column of the fold table that marks the training rows of fold `fold`."""
    return f"_in_fold_{fold}"


def fold_sizes_query(layout: DesignLayout, fold: exp.Expression) -> exp.Select:
    """Per fold of the training rows: fold, rows and prior weight (rows without weights)."""
    weight = exp.Sum(this=double(column(layout.weight))) if layout.weight else exp.Count(this=exp.Star())
    return (
        exp.select(alias(fold.copy(), FOLD), alias(exp.Count(this=exp.Star()), "rows"), alias(weight, "weight"))
        .from_(exp.to_table(layout.table))
        .where(training_rows(layout))
        .group_by(column(FOLD))
        .order_by(column(FOLD))
    )


def fold_table_query(layout: DesignLayout, fold: exp.Expression, folds: int) -> exp.Select:
    """The design table with one flag per fold marking that fold's training rows (held-out rows in none)."""
    flags = [
        alias(exp.Coalesce(this=exp.and_(exp.not_(column(layout.holdout)), exp.EQ(this=fold.copy(), expression=exp.Literal.number(index))),
                           expressions=[exp.false()]), fold_flag(index))
        for index in range(folds)
    ]
    return exp.select(exp.Star(), *flags).from_(exp.to_table(layout.table))

