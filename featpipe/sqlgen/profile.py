"""Training profiles of many columns, and the order statistics (values at exact ranks) they and the
learned terms' quantiles are read from.

The rows profiled are the design table's rows that are not held out, including rows a fit drops for
a NULL elsewhere: a term's NULL count is then the NULLs of that term among the training-side rows.
Every query here reads the design table's rows passing `where` (by default: not held out).

On DuckDB, which reads one column out at scan speed, a profile reads each column's values
(`column_values`) and numpy sorts them (featpipe.fitting.sorted_profile): one read per column, several
times faster than its percentile aggregate with the count and moments scans around it. Profiles on
other engines take three steps; the learned terms' quantiles, on every engine, the first two:
- `counts_query`: the non-NULL count n of every column, from which the wanted ranks follow;
- the values at those ranks, by one of two routes (featpipe.fitting.order_statistics chooses):
  - on engines with an exact discrete percentile aggregate that sorts and spills (`PERCENTILE_DIALECTS`),
    `percentiles_query`: each engine's own aggregate (DuckDB `quantile_disc`, PostgreSQL
    `PERCENTILE_DISC ... WITHIN GROUP`) asked for the fraction (r - 1/2) / n, which every one of them
    maps to rank r (the first value whose cumulative share reaches the fraction) without any question
    of rounding;
  - on Spark, whose PERCENTILE_DISC keeps a hash map of every distinct value per fraction in memory
    (16 columns of 1M distinct values stop the JVM on an out-of-memory error), a quantile summary
    brackets each rank and one counting scan finds the exact value inside (featpipe.sqlgen.brackets);
  - elsewhere (SQLite), and for a column whose bracket missed, `ranks_query`: all columns stacked with
    UNION ALL into (name, value) rows, counted per distinct value and accumulated in value order; only
    the values holding a wanted rank come back. Its cost grows with the distinct values (a window over
    every one of them), which an engine sorts and spills to disk;
- `moments_query` with `edges`: per column the non-NULL count, NULL count, sum, min, max and the sums
  of (x - median) and its square, from which the sample sd (n - 1) follows without cancellation, and
  per decile edge the rows at or below it, which give the bin shares.

Quantiles follow the inverted empirical CDF (numpy's method="inverted_cdf"): the q-quantile of n
sorted values is the value at rank ceil(q * n) (`quantile_rank`, in exact rational arithmetic, so no
float product such as 0.07 * 100 = 7.000000000000001 moves it). The median is the usual one: the mean
of the values at ranks floor((n + 1) / 2) and ceil((n + 1) / 2). Equal deciles collapse into one edge;
bin i holds edges[i-1] < v <= edges[i].
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from fractions import Fraction
from functools import reduce

from sqlglot import exp

from ..compiler.layout import DesignLayout
from .common import alias, column, double, null_count, number

DECILES = range(1, 10)
NAME, VALUE = "_name", "_value"
ROWS, AT_OR_BELOW = "_rows", "_at_or_below"
PERCENTILE_DIALECTS = ("duckdb", "postgres")  # an exact discrete percentile aggregate each, sorting (spilling) its values
COLUMNAR_DIALECTS = ("duckdb",)  # a query per column reads only that column: memory holds one column's values
FETCHED_DIALECTS = ("duckdb",)  # profiles read each column's values out and sort them in numpy


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


def _rows_read(layout: DesignLayout, where: exp.Expression | None = None) -> exp.Expression:
    """The rows the queries here read: `where`, by default the rows not held out."""
    return (where if where is not None else exp.not_(column(layout.holdout))).copy()


def column_values(layout: DesignLayout, expression: exp.Expression, where: exp.Expression | None = None) -> exp.Select:
    """The value (as DOUBLE, NULL kept) of `expression` on every row read (`where`, by default not held out)."""
    return exp.select(alias(double(expression.copy()), VALUE)).from_(exp.to_table(layout.table)).where(_rows_read(layout, where))


def training_values(
    layout: DesignLayout, columns: Mapping[str, exp.Expression], where: exp.Expression | None = None
) -> tuple[exp.Subquery, dict[str, exp.Column]]:
    """The rows read (`where`, by default not held out) with each column's value (as DOUBLE) computed once, and a reference to each.

    The moments query reads each value some twenty times; the linear predictor (a sum over every term)
    written into each of those aggregates was computed that often per row on PostgreSQL, which shares
    no repeated subexpression. From this subquery (kept apart there by the renderer's fence,
    `common.fenced`) it is computed once.
    """
    names = {name: f"_v{index}" for index, name in enumerate(columns)}
    rows = (
        exp.select(*(alias(double(expression.copy()), names[name]) for name, expression in columns.items()))
        .from_(exp.to_table(layout.table))
        .where(_rows_read(layout, where))
    )
    return rows.subquery("_training"), {name: column(inner) for name, inner in names.items()}


def counts_query(layout: DesignLayout, columns: Mapping[str, exp.Expression], where: exp.Expression | None = None) -> exp.Select:
    """One scan of the rows read: the non-NULL count of each column, in order."""
    rows, values = training_values(layout, columns, where)
    return exp.select(*(exp.Count(this=value) for value in values.values())).from_(rows)


def quantile_rank(q: Fraction, n: int) -> int:
    """The rank (1-based) of the q-quantile of n >= 1 sorted values (inverted CDF): ceil(q n), at least 1,
    in exact rational arithmetic."""
    return max(1, math.ceil(q * n))


def decile_rank(k: int, n: int) -> int:
    """The rank (1-based) of the k-th decile of n sorted values: ceil(k n / 10)."""
    return quantile_rank(Fraction(k, 10), n)


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
    layout: DesignLayout, columns: Mapping[str, exp.Expression], fractions: Mapping[str, Sequence[float]], dialect: str,
    where: exp.Expression | None = None,
) -> exp.Select:
    """One scan of the rows read: per column, its values at `fractions` (inverted CDF), by the dialect's
    exact aggregate, which answers one list per column (`read_percentiles`)."""
    rows, values = training_values(layout, columns, where)
    projections = []
    for name, value in values.items():
        wanted = [number(fraction) for fraction in fractions[name]]
        if dialect == "duckdb":
            projections.append(exp.Anonymous(this="quantile_disc", expressions=[value, exp.Array(expressions=wanted)]))
        elif dialect == "postgres":
            projections.append(_within_group(exp.Array(expressions=wanted), value))
        else:
            raise ValueError(f"no exact percentile aggregate for {dialect}; use ranks_query")
    return exp.select(*projections).from_(rows)


def _within_group(fraction: exp.Expression, value: exp.Expression) -> exp.WithinGroup:
    return exp.WithinGroup(this=exp.PercentileDisc(this=fraction), expression=exp.Order(expressions=[exp.Ordered(this=value)]))


def read_percentiles(fractions: Mapping[str, Sequence[float]], row: Sequence) -> dict[str, tuple[float, ...]]:
    """Per column of `percentiles_query`'s row, its values in the order of its fractions."""
    return {name: tuple(float(value) for value in values) for name, values in zip(fractions, row, strict=True)}


def ranks_query(
    layout: DesignLayout, columns: Mapping[str, exp.Expression], ranks: Mapping[str, Sequence[int]],
    where: exp.Expression | None = None,
) -> exp.Select:
    """Per column, the distinct non-NULL values that hold one of its `ranks`, in value order: name, value,
    rows with that value and rows at or below it (a value with r rows and c at or below holds the ranks
    c - r + 1 to c; `read_ranks`).

    Equal values are grouped first, so a column with few distinct values (an indicator, a count, a
    binned term) ranks only those, and the ranking is a total order: the same on every run and engine.
    """
    stacked = reduce(lambda left, right: exp.union(left, right, distinct=False), [
        column_values(layout, expression, where).select(alias(exp.Literal.string(name), NAME)) for name, expression in columns.items()
    ])
    return stacked_ranks_query(stacked, ranks)


def stacked_ranks_query(stacked: exp.Query, ranks: Mapping[str, Sequence[int]]) -> exp.Select:
    """`ranks_query` over the rows of `stacked`: a column's name in NAME and one of its values in VALUE."""
    counted = (
        exp.select(column(NAME), column(VALUE), alias(exp.Count(this=exp.Star()), ROWS))
        .from_(stacked.subquery("_values"))
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
    ).from_(counted.subquery("_counted"))
    held = [exp.Paren(this=exp.and_(exp.EQ(this=column(NAME), expression=exp.Literal.string(name)),
                                    exp.Paren(this=exp.or_(*(_holds(rank) for rank in wanted)))))
            for name, wanted in ranks.items()]
    return (
        exp.select(column(NAME), column(VALUE), column(ROWS), column(AT_OR_BELOW))
        .from_(cumulative.subquery("_cumulative"))
        .where(exp.or_(*held))
        .order_by(column(NAME), column(VALUE))
    )


def _holds(rank: int) -> exp.Expression:
    """The value holds `rank`: at_or_below - rows < rank <= at_or_below."""
    below = exp.Paren(this=exp.Sub(this=column(AT_OR_BELOW), expression=column(ROWS)))
    return exp.Paren(this=exp.and_(exp.LT(this=below, expression=_integer(rank)),
                                   exp.LTE(this=_integer(rank), expression=column(AT_OR_BELOW))))


def read_ranks(ranks: Mapping[str, Sequence[int]], rows: Sequence[tuple]) -> dict[str, dict[int, float]]:
    """Per column, its value at each of its `ranks`, from the rows of `ranks_query`."""
    found: dict[str, dict[int, float]] = {name: {} for name in ranks}
    for name, value, rows_with_value, at_or_below in rows:
        below = int(at_or_below) - int(rows_with_value)
        found[name].update({rank: float(value) for rank in ranks[name] if below < rank <= int(at_or_below)})
    return found


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
            null_count(value.copy()),
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


@dataclass(frozen=True)
class RankedValues:
    """The values of one column at the decile and median ranks, and the rows at or below each decile
    (from `moments_query` with edges): what `summarize` reads."""

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


def read_profiles(names: Sequence[str], order: Mapping[str, RankedValues], moments: Sequence) -> dict[str, Profile]:
    """A `Profile` per name, in the order of `names`, from the order statistics and `moments_query`'s row.

    A column with no non-NULL value has None for mean, sd, min, max and median and no edges or
    shares; the sample sd of a single value is None.
    """
    profiles = {}
    for index, name in enumerate(names):
        count, nulls, total, shifted, squares, low, high = moments[7 * index : 7 * index + 7]
        profiles[name] = summarize(int(count), int(nulls), total, shifted, squares, low, high, order[name])
    return profiles


def summarize(n: int, nulls: int, total, shifted, squares, low, high, order: RankedValues) -> Profile:
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
