"""Training profiles of many columns in two queries, and how to read them into `Profile`s.

The rows profiled are the design table's rows that are not held out, including rows a fit drops for
a NULL elsewhere: a term's NULL count is then the NULLs of that term among the training-side rows.
All columns are stacked with UNION ALL into (name, key, value) rows, so one query serves any number
of columns:

- `moments_query`: per column the non-NULL count, NULL count, sum, min, max and the sum of squared
  deviations from the column's mean (two-pass, so the sample sd has no cancellation).
- `order_statistics_query`: per column only the rows at the ranks the deciles and the median need,
  with the number of values at or below each (ties included), which gives the bin shares.

Quantiles follow the inverted empirical CDF (numpy's method="inverted_cdf"): the q-quantile of n
sorted values is the value at rank ceil(q * n). For the k-th decile that rank is the smallest r with
10 r >= k n, tested in SQL with integer arithmetic only, so no engine's CEIL or division rules
matter. The median is the usual one: the mean of the values at ranks floor((n + 1) / 2) and
ceil((n + 1) / 2). Ranks come from ROW_NUMBER ordered by value, then key, so they are the same on
every run and engine; the values at a rank do not depend on how ties are ordered.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from functools import reduce

from sqlglot import exp

from ..fitted import Profile
from .common import alias, column, double
from .layout import DesignLayout

DECILES = range(1, 10)
NAME, KEY, VALUE, MEAN = "_name", "_key", "_value", "_mean"
RANK, COUNT, AT_OR_BELOW = "_rank", "_n", "_at_or_below"


def profile_values(layout: DesignLayout, columns: Mapping[str, exp.Expression]) -> exp.Query:
    """(name, key, value as DOUBLE) of every not-held-out row, for each column, stacked with UNION ALL."""
    if not columns:
        raise ValueError("no columns to profile")
    branches = [
        exp.select(
            alias(exp.Literal.string(name), NAME),
            alias(column(layout.key), KEY),
            alias(double(expression.copy()), VALUE),
        )
        .from_(exp.to_table(layout.table))
        .where(exp.not_(column(layout.holdout)))
        for name, expression in columns.items()
    ]
    return reduce(lambda left, right: exp.union(left, right, distinct=False), branches)


def moments_query(layout: DesignLayout, columns: Mapping[str, exp.Expression]) -> exp.Select:
    """Per column: name, count (non-NULL), nulls, sum, min, max, sum of squared deviations from the mean."""
    value = column(VALUE)
    mean = exp.Window(this=exp.Avg(this=column(VALUE)), partition_by=[column(NAME)])
    centred = exp.select(column(NAME), column(VALUE), alias(mean, MEAN)).from_(
        profile_values(layout, columns).subquery("_values")
    )
    deviation = exp.Paren(this=exp.Sub(this=value.copy(), expression=column(MEAN)))
    return (
        exp.select(
            column(NAME),
            alias(exp.Count(this=value.copy()), "count"),
            alias(exp.Sub(this=exp.Count(this=exp.Star()), expression=exp.Count(this=value.copy())), "nulls"),
            alias(exp.Sum(this=value.copy()), "sum"),
            alias(exp.Min(this=value.copy()), "min"),
            alias(exp.Max(this=value.copy()), "max"),
            alias(exp.Sum(this=exp.Mul(this=deviation, expression=deviation.copy())), "squares"),
        )
        .from_(centred.subquery("_centred"))
        .group_by(column(NAME))
        .order_by(column(NAME))
    )


def order_statistics_query(layout: DesignLayout, columns: Mapping[str, exp.Expression]) -> exp.Select:
    """Per column, the non-NULL values at the decile and median ranks: name, rank, n, value, at-or-below count."""
    by_name = [column(NAME)]
    by_value = exp.Order(expressions=[exp.Ordered(this=column(VALUE))])
    by_value_then_key = exp.Order(expressions=[exp.Ordered(this=column(VALUE)), exp.Ordered(this=column(KEY))])
    peers_and_below = exp.WindowSpec(kind="RANGE", start="UNBOUNDED", start_side="PRECEDING", end="CURRENT ROW")
    ranked = (
        exp.select(
            column(NAME),
            column(VALUE),
            alias(exp.Window(this=exp.RowNumber(), partition_by=by_name, order=by_value_then_key), RANK),
            alias(exp.Window(this=exp.Count(this=exp.Star()), partition_by=[column(NAME)]), COUNT),
            alias(exp.Window(this=exp.Count(this=exp.Star()), partition_by=[column(NAME)], order=by_value,
                             spec=peers_and_below), AT_OR_BELOW),
        )
        .from_(profile_values(layout, columns).subquery("_values"))
        .where(column(VALUE).is_(exp.null()).not_())
    )
    return (
        exp.select(column(NAME), column(RANK), column(COUNT), column(VALUE), column(AT_OR_BELOW))
        .from_(ranked.subquery("_ranked"))
        .where(exp.or_(*(_is_decile_rank(k) for k in DECILES), _is_median_rank()))
        .order_by(column(NAME), column(RANK))
    )


def _integer(value: int) -> exp.Literal:
    return exp.Literal.number(value)


def _times(factor: int, name: str) -> exp.Mul:
    return exp.Mul(this=_integer(factor), expression=column(name))


def _is_decile_rank(k: int) -> exp.Expression:
    """rank = ceil(k n / 10), as 10 rank >= k n AND 10 (rank - 1) < k n."""
    previous = exp.Paren(this=exp.Sub(this=column(RANK), expression=_integer(1)))
    return exp.Paren(this=exp.and_(
        exp.GTE(this=_times(10, RANK), expression=_times(k, COUNT)),
        exp.LT(this=exp.Mul(this=_integer(10), expression=previous), expression=_times(k, COUNT)),
    ))


def _is_median_rank() -> exp.Expression:
    """rank is floor((n + 1) / 2) or ceil((n + 1) / 2), as n <= 2 rank <= n + 2."""
    return exp.Paren(this=exp.and_(
        exp.GTE(this=_times(2, RANK), expression=column(COUNT)),
        exp.LTE(this=_times(2, RANK), expression=exp.Add(this=column(COUNT), expression=_integer(2))),
    ))


def decile_rank(k: int, n: int) -> int:
    """The rank (1-based) of the k-th decile of n sorted values: ceil(k n / 10), in exact integers."""
    return (k * n + 9) // 10


def read_profiles(names: Sequence[str], moments: Sequence[tuple], order_statistics: Sequence[tuple]) -> dict[str, Profile]:
    """A `Profile` per name, in the order of `names`, from the rows of the two queries above.

    A column with no non-NULL value has None for mean, sd, min, max and median and no edges or
    shares; the sample sd of a single value is None.
    """
    at_rank: dict[str, dict[int, tuple[float, int]]] = {name: {} for name in names}
    for name, rank, _, value, at_or_below in order_statistics:
        at_rank[name][int(rank)] = (float(value), int(at_or_below))
    profiles = {}
    for name, count, nulls, total, low, high, squares in moments:
        profiles[name] = _profile(int(count), int(nulls), total, low, high, squares, at_rank[name])
    return {name: profiles[name] for name in names}


def _profile(n: int, nulls: int, total, low, high, squares, at_rank: dict[int, tuple[float, int]]) -> Profile:
    if n == 0:
        return Profile(count=0, nulls=nulls, mean=None, sd=None, min=None, max=None, median=None, edges=(), shares=())
    lower, upper = at_rank[(n + 1) // 2][0], at_rank[(n + 2) // 2][0]
    edges: list[float] = []
    at_or_below: list[int] = []
    for k in DECILES:
        value, below = at_rank[decile_rank(k, n)]
        if not edges or value != edges[-1]:
            edges.append(value)
            at_or_below.append(below)
    counts = [b - a for a, b in zip([0, *at_or_below], [*at_or_below, n])]
    return Profile(
        count=n,
        nulls=nulls,
        mean=float(total) / n,
        sd=math.sqrt(float(squares) / (n - 1)) if n > 1 else None,
        min=float(low),
        max=float(high),
        median=(lower + upper) / 2,
        edges=tuple(edges),
        shares=tuple(c / n for c in counts),
    )
