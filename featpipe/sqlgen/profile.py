"""Training profiles of many columns: the queries, and how to read them into `Profile`s.

The rows profiled are the design table's rows that are not held out, including rows a fit drops for
a NULL elsewhere: a term's NULL count is then the NULLs of that term among the training-side rows.

On a columnar embedded engine (`FETCHED_DIALECTS`: DuckDB) `column_values` reads one column's values
out at scan speed, and numpy sorts them (featpipe.fitting.sorted_profile): fewer passes and faster
than the engine's own percentile aggregate there.
On engines with an exact discrete percentile aggregate that sorts (`PERCENTILE_DIALECTS`), three scans:
- `counts_query`: the non-NULL count n of every column;
- `percentiles_query`: the values at the ranks the deciles and the median need, by each engine's own
  aggregate (DuckDB `quantile_disc`, PostgreSQL `PERCENTILE_DISC ... WITHIN GROUP`) asked for
  the fraction (r - 1/2) / n, which every one of them maps to rank r (the first value whose cumulative
  share reaches the fraction) without any question of rounding;
- `moments_query` with `edges`: the moments below plus, per decile edge, the rows at or below it,
  which give the bin shares.
Elsewhere (Spark, SQLite) the portable route:
- `order_statistics_query`: all columns stacked with UNION ALL into (name, value) rows, counted per
  distinct value and accumulated in value order; only the values holding the ranks the deciles and
  the median need come back, each with the number of values at or below it, which gives the bin shares.
  Its cost grows with the distinct values (a window over every one of them); Spark sorts and spills
  it to disk, where its PERCENTILE_DISC keeps a hash map of every distinct value per fraction in memory
  (16 columns of 1M distinct values stop the JVM on an out-of-memory error).
- `moments_query`: one scan; per column the non-NULL count, NULL count, sum, min, max and the sums
  of (x - median) and its square, from which the sample sd (n - 1) follows without cancellation.

Quantiles follow the inverted empirical CDF (numpy's method="inverted_cdf"): the q-quantile of n
sorted values is the value at rank ceil(q * n). For the k-th decile that rank is the smallest r with
10 r >= k n, tested in SQL with integer arithmetic only, so no engine's CEIL or division rules
matter. The median is the usual one: the mean of the values at ranks floor((n + 1) / 2) and
ceil((n + 1) / 2). Equal deciles collapse into one edge; bin i holds edges[i-1] < v <= edges[i].
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import reduce

from sqlglot import exp

from ..compiler.layout import DesignLayout
from .common import alias, column, double, number

DECILES = range(1, 10)
NAME, VALUE = "_name", "_value"
ROWS, AT_OR_BELOW, COUNT = "_rows", "_at_or_below", "_n"
FETCHED_DIALECTS = ("duckdb",)  # columnar and local: one column's values come out at scan speed, to be sorted in numpy
PERCENTILE_DIALECTS = ("postgres",)  # an exact discrete percentile aggregate that sorts (spills) its values


@dataclass(frozen=True)
class Profile:
    """Training distribution of a term (or of the linear predictor), kept for drift and reports.

    `edges` are the distinct deciles of the non-NULL training values (ties collapse into one edge);
    bin i holds values v with edges[i-1] < v <= edges[i], the first bin everything up to edges[0] and
    the last everything above edges[-1]. `shares` are the training shares of those bins among
    non-NULL rows; NULLs are counted apart in `nulls`.
    """

    count: int
    nulls: int
    mean: float
    sd: float
    min: float
    max: float
    median: float
    edges: tuple[float, ...]
    shares: tuple[float, ...]


def column_values(layout: DesignLayout, expression: exp.Expression) -> exp.Select:
    """The value (as DOUBLE, NULL kept) of `expression` on every not-held-out row."""
    return exp.select(alias(double(expression.copy()), VALUE)).from_(exp.to_table(layout.table)).where(exp.not_(column(layout.holdout)))


def profile_values(layout: DesignLayout, columns: Mapping[str, exp.Expression]) -> exp.Query:
    """(value as DOUBLE, name) of every not-held-out row, for each column, stacked with UNION ALL."""
    if not columns:
        raise ValueError("no columns to profile")
    branches = [column_values(layout, expression).select(alias(exp.Literal.string(name), NAME)) for name, expression in columns.items()]
    return reduce(lambda left, right: exp.union(left, right, distinct=False), branches)


def order_statistics_query(layout: DesignLayout, columns: Mapping[str, exp.Expression]) -> exp.Select:
    """Per column, the distinct non-NULL values that hold a decile or median rank, in value order:
    name, value, rows with that value, rows at or below it, and n.

    Equal values are grouped first, so a column with few distinct values (an indicator, a count, a
    binned term) ranks only those, and the ranking is a total order: the same on every run and engine.
    A value with `rows` r and `at_or_below` c holds the ranks c - r + 1 to c.
    """
    counted = (
        exp.select(column(NAME), column(VALUE), alias(exp.Count(this=exp.Star()), ROWS))
        .from_(profile_values(layout, columns).subquery("_values"))
        .where(column(VALUE).is_(exp.null()).not_())
        .group_by(column(NAME), column(VALUE))
    )
    running = exp.WindowSpec(kind="ROWS", start="UNBOUNDED", start_side="PRECEDING", end="CURRENT ROW")
    by_value = exp.Order(expressions=[exp.Ordered(this=column(VALUE))])
    cumulative = exp.select(
        column(NAME),
        column(VALUE),
        column(ROWS),
        alias(exp.Window(this=exp.Sum(this=column(ROWS)), partition_by=[column(NAME)], order=by_value, spec=running),
              AT_OR_BELOW),
        alias(exp.Window(this=exp.Sum(this=column(ROWS)), partition_by=[column(NAME)]), COUNT),
    ).from_(counted.subquery("_counted"))
    return (
        exp.select(column(NAME), column(VALUE), column(ROWS), column(AT_OR_BELOW), column(COUNT))
        .from_(cumulative.subquery("_cumulative"))
        .where(exp.or_(*(_holds_decile(k) for k in DECILES), _holds_median()))
        .order_by(column(NAME), column(VALUE))
    )


def training_values(layout: DesignLayout, columns: Mapping[str, exp.Expression]) -> tuple[exp.Subquery, dict[str, exp.Column]]:
    """The not-held-out rows with each column's value (as DOUBLE) computed once, and a reference to each.

    The moments query reads each value some twenty times; the linear predictor (a sum over every term)
    written into each of those aggregates was computed that often per row on PostgreSQL, which shares
    no repeated subexpression. From this subquery (kept apart there by the renderer's fence,
    `common.fenced`) it is computed once.
    """
    names = {name: f"_v{index}" for index, name in enumerate(columns)}
    rows = (
        exp.select(*(alias(double(expression.copy()), names[name]) for name, expression in columns.items()))
        .from_(exp.to_table(layout.table))
        .where(exp.not_(column(layout.holdout)))
    )
    return rows.subquery("_training"), {name: column(inner) for name, inner in names.items()}


def counts_query(layout: DesignLayout, columns: Mapping[str, exp.Expression]) -> exp.Select:
    """One scan of the not-held-out rows: the non-NULL count of each column, in order."""
    rows, values = training_values(layout, columns)
    return exp.select(*(exp.Count(this=value) for value in values.values())).from_(rows)


def needed_ranks(n: int) -> tuple[int, ...]:
    """The ranks (ascending, distinct) holding the deciles and the median of n sorted values."""
    if n == 0:
        return ()
    return tuple(sorted({*(decile_rank(k, n) for k in DECILES), (n + 1) // 2, (n + 2) // 2}))


def rank_fraction(rank: int, n: int) -> float:
    """The fraction an inverted-CDF percentile aggregate maps to `rank` of n: halfway between ranks,
    so ceil(fraction n) is `rank` whatever the engine's rounding of fraction * n."""
    return (rank - 0.5) / n


def percentiles_query(
    layout: DesignLayout, columns: Mapping[str, exp.Expression], fractions: Mapping[str, Sequence[float]], dialect: str
) -> exp.Select:
    """One scan of the not-held-out rows: per column, its values at `fractions` (inverted CDF), by the
    dialect's exact aggregate, which answers one list per column (`read_percentiles`)."""
    rows, values = training_values(layout, columns)
    projections = []
    for name, value in values.items():
        wanted = [number(fraction) for fraction in fractions[name]]
        if dialect == "duckdb":
            projections.append(exp.Anonymous(this="quantile_disc", expressions=[value, exp.Array(expressions=wanted)]))
        elif dialect == "postgres":
            projections.append(_within_group(exp.Array(expressions=wanted), value))
        else:
            raise ValueError(f"no exact percentile aggregate for {dialect}; use order_statistics_query")
    return exp.select(*projections).from_(rows)


def _within_group(fraction: exp.Expression, value: exp.Expression) -> exp.WithinGroup:
    return exp.WithinGroup(this=exp.PercentileDisc(this=fraction), expression=exp.Order(expressions=[exp.Ordered(this=value)]))


def read_percentiles(fractions: Mapping[str, Sequence[float]], row: Sequence) -> dict[str, tuple[float, ...]]:
    """Per column of `percentiles_query`'s row, its values in the order of its fractions."""
    return {name: tuple(float(value) for value in values) for name, values in zip(fractions, row, strict=True)}


def moments_query(
    layout: DesignLayout, columns: Mapping[str, exp.Expression], shifts: Mapping[str, float],
    edges: Mapping[str, Sequence[float]] | None = None,
) -> exp.Select:
    """One scan of the not-held-out rows; per column (in order) seven values: count (non-NULL), nulls,
    sum, sum of (x - shift), sum of (x - shift)^2, min, max. With `edges`, then per column and edge
    the rows at or below the edge.

    With the median as shift the sample variance from the shifted sums keeps its digits, because the
    mean lies within one standard deviation of the median.
    """
    rows, values = training_values(layout, columns)
    projections = []
    for name, value in values.items():
        shifted = exp.Paren(this=exp.Sub(this=value.copy(), expression=number(shifts[name])))
        projections += [
            exp.Count(this=value.copy()),
            exp.Sub(this=exp.Count(this=exp.Star()), expression=exp.Count(this=value.copy())),
            exp.Sum(this=value.copy()),
            exp.Sum(this=shifted),
            exp.Sum(this=exp.Mul(this=shifted.copy(), expression=shifted.copy())),
            exp.Min(this=value.copy()),
            exp.Max(this=value.copy()),
        ]
    for name, at in (edges or {}).items():
        value = values[name]
        projections += [
            exp.Sum(this=exp.Case(ifs=[exp.If(this=exp.LTE(this=value.copy(), expression=number(edge)), true=_integer(1))],
                                  default=_integer(0)))
            for edge in at
        ]
    return exp.select(*projections).from_(rows)


def _integer(value: int) -> exp.Literal:
    return exp.Literal.number(value)


def _times(factor: int, expression: exp.Expression) -> exp.Mul:
    return exp.Mul(this=_integer(factor), expression=expression)


def _below() -> exp.Expression:
    """Rows strictly below the value: at_or_below - rows."""
    return exp.Paren(this=exp.Sub(this=column(AT_OR_BELOW), expression=column(ROWS)))


def _holds_decile(k: int) -> exp.Expression:
    """The value holds rank ceil(k n / 10): 10 below < k n <= 10 at_or_below."""
    return exp.Paren(this=exp.and_(
        exp.LT(this=_times(10, _below()), expression=_times(k, column(COUNT))),
        exp.LTE(this=_times(k, column(COUNT)), expression=_times(10, column(AT_OR_BELOW))),
    ))


def _holds_median() -> exp.Expression:
    """The value holds rank floor((n + 1) / 2) or ceil((n + 1) / 2): 2 below <= n <= 2 at_or_below."""
    return exp.Paren(this=exp.and_(
        exp.LTE(this=_times(2, _below()), expression=column(COUNT)),
        exp.LTE(this=column(COUNT), expression=_times(2, column(AT_OR_BELOW))),
    ))


def decile_rank(k: int, n: int) -> int:
    """The rank (1-based) of the k-th decile of n sorted values: ceil(k n / 10), in exact integers."""
    return (k * n + 9) // 10


@dataclass(frozen=True)
class OrderStatistics:
    """The values of one column that hold the decile and median ranks (n = 0 without values)."""

    n: int
    values: tuple[tuple[float, int, int], ...] = ()  # (value, rows below it, rows at or below it), ascending

    def at(self, rank: int) -> tuple[float, int]:
        """The value at `rank` (1-based) and the count of values at or below it."""
        for value, below, at_or_below in self.values:
            if below < rank <= at_or_below:
                return value, at_or_below
        raise ValueError(f"rank {rank} of {self.n} was not selected")

    def median(self) -> float | None:
        if self.n == 0:
            return None
        return (self.at((self.n + 1) // 2)[0] + self.at((self.n + 2) // 2)[0]) / 2


@dataclass(frozen=True)
class RankedValues:
    """The values of one column at the decile and median ranks, and the rows at or below each decile:
    what `summarize` reads of `OrderStatistics`, from percentile aggregates and a counting scan."""

    n: int
    by_rank: Mapping[int, float]
    at_or_below: Mapping[float, int]

    def at(self, rank: int) -> tuple[float, int | None]:
        value = self.by_rank[rank]
        return value, self.at_or_below.get(value)

    def median(self) -> float | None:
        if self.n == 0:
            return None
        return (self.by_rank[(self.n + 1) // 2] + self.by_rank[(self.n + 2) // 2]) / 2

    def edges(self) -> tuple[float, ...]:
        """The distinct deciles, ascending."""
        return tuple(sorted({self.by_rank[decile_rank(k, self.n)] for k in DECILES})) if self.n else ()


def ranked_values(counts: Mapping[str, int], values: Mapping[str, Sequence[float]]) -> dict[str, RankedValues]:
    """Per column, its `RankedValues` (no edge counts yet) from its count and its values at `needed_ranks`."""
    return {
        name: RankedValues(n, dict(zip(needed_ranks(n), values.get(name, ()), strict=True)), {})
        for name, n in counts.items()
    }


def with_edge_counts(order: Mapping[str, RankedValues], tail: Sequence) -> dict[str, RankedValues]:
    """`order` with the rows at or below each edge, from the values `moments_query` adds after the moments
    (per column in order, per edge ascending)."""
    counted, position = {}, 0
    for name, ranked in order.items():
        edges = ranked.edges()
        at_or_below = {edge: int(count or 0) for edge, count in zip(edges, tail[position : position + len(edges)], strict=True)}
        position += len(edges)
        counted[name] = RankedValues(ranked.n, ranked.by_rank, at_or_below)
    return counted


def read_order_statistics(names: Sequence[str], rows: Sequence[tuple]) -> dict[str, OrderStatistics]:
    """Per name, its `OrderStatistics` from the rows of `order_statistics_query`."""
    counts = {name: 0 for name in names}
    values: dict[str, list[tuple[float, int, int]]] = {name: [] for name in names}
    for name, value, rows_with_value, at_or_below, n in rows:
        counts[name] = int(n)
        values[name].append((float(value), int(at_or_below) - int(rows_with_value), int(at_or_below)))
    return {name: OrderStatistics(counts[name], tuple(values[name])) for name in names}


def read_profiles(names: Sequence[str], order: Mapping[str, OrderStatistics | RankedValues], moments: Sequence) -> dict[str, Profile]:
    """A `Profile` per name, in the order of `names`, from the order statistics and `moments_query`'s row.

    A column with no non-NULL value has None for mean, sd, min, max and median and no edges or
    shares; the sample sd of a single value is None.
    """
    profiles = {}
    for index, name in enumerate(names):
        count, nulls, total, shifted, squares, low, high = moments[7 * index : 7 * index + 7]
        profiles[name] = summarize(int(count), int(nulls), total, shifted, squares, low, high, order[name])
    return profiles


def summarize(n: int, nulls: int, total, shifted, squares, low, high, order: OrderStatistics | RankedValues) -> Profile:
    """A `Profile` from a column's counts, sum, sums of (x - shift) and its square, min, max and order statistics."""
    if n == 0:
        return Profile(count=0, nulls=nulls, mean=None, sd=None, min=None, max=None, median=None, edges=(), shares=())
    edges: list[float] = []
    at_or_below: list[int] = []
    for k in DECILES:
        value, below = order.at(decile_rank(k, n))
        if not edges or value != edges[-1]:
            edges.append(value)
            at_or_below.append(below)
    counts = [b - a for a, b in zip([0, *at_or_below], [*at_or_below, n])]
    offset = float(shifted) / n
    variance = max(float(squares) - n * offset * offset, 0.0) / (n - 1) if n > 1 else None
    return Profile(
        count=n,
        nulls=nulls,
        mean=float(total) / n,
        sd=math.sqrt(variance) if variance is not None else None,
        min=float(low),
        max=float(high),
        median=order.median(),
        edges=tuple(edges),
        shares=tuple(c / n for c in counts),
    )
