"""The shape of a model's design table, shared by every query that reads it."""

from __future__ import annotations

from dataclasses import dataclass

from sqlglot import exp

from .common import column

HOLDOUT_COLUMN = "_holdout"
OFFSET_COLUMN = "_offset"
WEIGHT_COLUMN = "_weight"


@dataclass(frozen=True)
class DesignLayout:
    """Columns of `design_<model>`: key, target (DOUBLE), optional offset and weight, holdout flag, terms.

    Every term column is DOUBLE (booleans become 1.0/0.0, NULL stays NULL).
    """

    table: str
    key: str
    target: str
    terms: tuple[str, ...]
    offset: str | None = None
    weight: str | None = None
    holdout: str = HOLDOUT_COLUMN

    @property
    def model_columns(self) -> tuple[str, ...]:
        """Columns that must be non-NULL for a row to take part in a fit."""
        extra = tuple(c for c in (self.offset, self.weight) if c)
        return (self.target, *extra, *self.terms)

    def complete_rows(self) -> exp.Expression:
        return exp.and_(*(column(name).is_(exp.null()).not_() for name in self.model_columns))

    def training_rows(self) -> exp.Expression:
        """Rows a fit uses: not held out and no NULL in target, offset, weight or any term."""
        return exp.and_(exp.not_(column(self.holdout)), self.complete_rows())

    def holdout_rows(self) -> exp.Expression:
        return exp.and_(column(self.holdout), self.complete_rows())


def design_table_name(model: str) -> str:
    return f"design_{model}"
