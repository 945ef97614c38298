"""The shape of a model's design table, shared by every query that reads it."""

from __future__ import annotations

from dataclasses import dataclass

from ..project.names import HOLDOUT_COLUMN


@dataclass(frozen=True)
class DesignLayout:
    """Columns of `design_<model>`: key, target (DOUBLE), optional offset, weight and cluster, holdout flag, terms.

    Every term column is DOUBLE (booleans become 1.0/0.0, NULL stays NULL).
    """

    table: str
    key: str
    target: str
    terms: tuple[str, ...]
    offset: str | None = None
    weight: str | None = None
    cluster: str | None = None  # the column grouping rows for cluster-robust standard errors, as read
    holdout: str = HOLDOUT_COLUMN

    @property
    def model_columns(self) -> tuple[str, ...]:
        """Columns that must be non-NULL for a row to take part in a fit."""
        extra = tuple(c for c in (self.offset, self.weight) if c)
        return (self.target, *extra, *self.terms)
