"""Input health queries: the NULLs of each input column a model's terms read and, for text columns,
the levels seen, on the training rows at a fit and on a batch at drift.

At a fit, over the input's rows that are not held out (the rows the term profiles describe):
`training_nulls_query` gives one row (rows, then NULLs per column) and `levels_query` the distinct
non-NULL values of one text column, at most `limit` of them. At drift, `batch_health_query` gives one
row over the batch: rows, then per column its NULLs and, for a text column whose training levels are
known, the rows holding a level never seen in training (a non-NULL value outside the training levels,
written into the query as string literals).

Output columns are named in featpipe.project.names: `rows`, `<column>__nulls`, `<column>__unseen`.

Example:
    >>> training_nulls_query("leases", "lease_id", Holdout(0.3, "v1"), ["sector"]).sql(identify=True)  # doctest: +SKIP
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from sqlglot import exp

from ..project import Holdout
from ..project.names import NULL_BIN, ROWS, bin_column, table_reference, unseen_column
from .common import alias, column, count_if, null_count
from .design import holdout_flag


def nulls_column(name: str) -> str:
    return bin_column(name, NULL_BIN)


def training_nulls_query(table: str, key: str, holdout: Holdout, columns: Sequence[str]) -> exp.Select:
    """One row over the not-held-out rows of `table`: rows, then the NULLs of every column."""
    counted = [alias(exp.Count(this=exp.Star()), ROWS)]
    counted += [alias(null_count(column(name)), nulls_column(name)) for name in columns]
    return exp.select(*counted).from_(_table(table)).where(exp.not_(holdout_flag(key, holdout)))


def levels_query(table: str, key: str, holdout: Holdout, name: str, limit: int) -> exp.Select:
    """The distinct non-NULL values of text column `name` on the not-held-out rows, at most `limit`."""
    value = column(name)
    return (
        exp.select(value).distinct().from_(_table(table))
        .where(exp.and_(exp.not_(holdout_flag(key, holdout)), value.copy().is_(exp.null()).not_()))
        .order_by(value.copy()).limit(limit)
    )


def batch_health_query(table: str, columns: Sequence[str], levels: Mapping[str, Sequence[str]]) -> exp.Select:
    """One row over `table`: rows, NULLs per column and, per column of `levels`, the rows at an unseen level."""
    counted = [alias(exp.Count(this=exp.Star()), ROWS)]
    for name in columns:
        counted.append(alias(null_count(column(name)), nulls_column(name)))
        if name in levels:
            known = [exp.Literal.string(level) for level in levels[name]]
            unseen = exp.not_(exp.In(this=column(name), expressions=known)) if known else exp.true()
            counted.append(alias(count_if(exp.and_(column(name).is_(exp.null()).not_(), unseen)), unseen_column(name)))
    return exp.select(*counted).from_(_table(table))


def _table(table: str) -> exp.Table:
    return table_reference(table, "--table")
