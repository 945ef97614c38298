"""Values at exact ranks in two bounded scans, on an engine with a quantile summary (Spark).

The window route (featpipe.sqlgen.profile.ranks_query) sorts every distinct value of every column;
on Spark that was a third of a fit's time (31 of 97 s on 1M rows). Here a summary first brackets
each wanted rank, then one counting scan finds the exact value inside its bracket:

- `sketch_query`: per column Spark's APPROX_PERCENTILE, a quantile summary in memory that does not
  grow with the rows, whose value at a fraction p has a rank within n / accuracy of p n (Spark's
  documentation: "1.0/accuracy is the relative error of the approximation"). Asked for the fractions
  a margin of 2 n / accuracy ranks below and above rank r (`bracket_fractions`), it gives an interval
  [low, high] holding the value at rank r;
- `segments_query`: every non-NULL value placed by comparisons alone among its column's disjoint
  intervals (`merged`): a value inside an interval is counted per distinct value, the values in each
  gap before, between and after the intervals as one count;
- `read_segments`: the counts in value order give every value's exact rank, so the value at rank r
  is read off when r falls inside an interval. When it falls in a gap (the summary missed, which its
  error bound rules out), the column is None and is ranked by the window route instead: the answer
  never rests on the approximation, only the speed does.

Only the values inside the intervals come back: a few hundred rows per rank (`sketch_accuracy`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from functools import reduce

from sqlglot import exp

from ..compiler.layout import DesignLayout
from .common import alias, column, number
from .profile import NAME, ROWS, VALUE, column_values, training_values

SKETCH_DIALECTS = ("spark",)  # APPROX_PERCENTILE with a documented rank error, in bounded memory
SEGMENT = "_segment"
MARGIN = 2  # bracket half-width, in multiples of the summary's rank error n / accuracy


def sketch_accuracy(n: int) -> int:
    """The summary's accuracy for n values: brackets of about 4 n / accuracy rows (at most 400 up to 10M
    values), and Spark's default 10000 at the least, a summary of bounded size at the most."""
    return min(max(n // 100, 10_000), 100_000)


def bracket_fractions(rank: int, n: int, accuracy: int) -> tuple[float, float]:
    """The fractions whose approximate values bound the value at `rank` of n: MARGIN rank errors below
    rank - 1 and above rank, within [0, 1]."""
    margin = MARGIN / accuracy
    return max(0.0, (rank - 1) / n - margin), min(1.0, rank / n + margin)


def sketch_query(
    layout: DesignLayout, columns: Mapping[str, exp.Expression], fractions: Mapping[str, Sequence[float]],
    accuracies: Mapping[str, int], where: exp.Expression | None = None,
) -> exp.Select:
    """One scan of the rows read: per column, its approximate values at `fractions` (one list per column,
    read by featpipe.sqlgen.profile.read_percentiles)."""
    rows, values = training_values(layout, columns, where)
    return exp.select(*(
        exp.ApproxQuantile(this=value, quantile=exp.Array(expressions=[number(fraction) for fraction in fractions[name]]),
                           accuracy=exp.Literal.number(accuracies[name]))
        for name, value in values.items()
    )).from_(rows)


def merged(intervals: Sequence[tuple[float, float]]) -> tuple[tuple[float, float], ...]:
    """Closed intervals [low, high] as disjoint ones in ascending order (overlapping ones joined)."""
    joined: list[tuple[float, float]] = []
    for low, high in sorted(intervals):
        if joined and low <= joined[-1][1]:
            joined[-1] = (joined[-1][0], max(joined[-1][1], high))
        else:
            joined.append((low, high))
    return tuple(joined)


def segments_query(
    layout: DesignLayout, columns: Mapping[str, exp.Expression], intervals: Mapping[str, Sequence[tuple[float, float]]],
    where: exp.Expression | None = None,
) -> exp.Select:
    """One scan per column of the rows read, stacked: name, segment, value, rows. A column's values fall
    in segment 2i + 1 inside its i-th interval (of `merged` ones), each distinct value a row; in
    segment 2i in the gap below that interval, and 2m above the last of m, one row per gap with a NULL value."""
    stacked = reduce(lambda left, right: exp.union(left, right, distinct=False), [
        _placed(column_values(layout, columns[name], where), name, bounds) for name, bounds in intervals.items()
    ])
    return (
        exp.select(column(NAME), column(SEGMENT), column(VALUE), alias(exp.Count(this=exp.Star()), ROWS))
        .from_(stacked.subquery("_placed"))
        .group_by(column(NAME), column(SEGMENT), column(VALUE))
    )


def _placed(values: exp.Select, name: str, intervals: Sequence[tuple[float, float]]) -> exp.Select:
    """A column's non-NULL values with their segment, the value kept inside an interval only."""
    segment, kept = exp.Case(), exp.Case()
    for index, (low, high) in enumerate(intervals):
        below, inside = exp.LT(this=column(VALUE), expression=number(low)), exp.LTE(this=column(VALUE), expression=number(high))
        segment = segment.when(below, exp.Literal.number(2 * index)).when(inside, exp.Literal.number(2 * index + 1))
        kept = kept.when(below.copy(), exp.null()).when(inside.copy(), column(VALUE))
    segment = segment.else_(exp.Literal.number(2 * len(intervals)))
    return (
        exp.select(alias(exp.Literal.string(name), NAME), alias(segment, SEGMENT), alias(kept, VALUE))
        .from_(values.subquery("_values"))
        .where(column(VALUE).is_(exp.null()).not_())
    )


def read_segments(ranks: Mapping[str, Sequence[int]], rows: Sequence[tuple]) -> dict[str, dict[int, float] | None]:
    """Per column, its value at each of its `ranks` from `segments_query`'s rows; None for a column with a
    rank in a gap (its interval missed the value), or with no rows at all."""
    placed: dict[str, list[tuple[int, float, int]]] = {name: [] for name in ranks}
    for name, segment, value, count in rows:
        placed[name].append((int(segment), -math.inf if value is None else float(value), int(count)))
    found: dict[str, dict[int, float] | None] = {}
    for name, wanted in ranks.items():
        values: dict[int, float] = {}
        pending, at_or_below = sorted(wanted), 0
        for segment, value, count in sorted(placed[name]):
            at_or_below += count
            while pending and pending[0] <= at_or_below:
                if segment % 2 == 0:  # a gap: the rank's value was not bracketed
                    break
                values[pending.pop(0)] = value
            if pending and pending[0] <= at_or_below:
                break
        found[name] = values if not pending else None
    return found
