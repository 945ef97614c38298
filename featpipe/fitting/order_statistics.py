"""Values of many columns at exact ranks (order statistics), by the route the engine runs best.

The training profiles (deciles, median) and the learned terms' quantiles (BINS edges, SPLINE knots,
CAPPED caps) both read them: first the non-NULL count n of each column, then the values at the ranks
each caller derives from n. On DuckDB and PostgreSQL an exact percentile aggregate that sorts and spills
answers in one scan whatever the distinct values (a query per column on DuckDB, which then reads only
that column). On Spark, whose PERCENTILE_DISC holds every distinct value in memory once per fraction,
a quantile summary brackets each rank and a counting scan reads the exact value inside the bracket
(featpipe.sqlgen.brackets). Elsewhere (SQLite, which has neither), and for a column whose bracket
missed, a window over the distinct values that the engine can spill. Every route gives the same value
at a rank, bit for bit. SQL: featpipe.sqlgen.profile.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

from sqlglot import exp

from ..compiler.layout import DesignLayout
from ..engines.base import Engine
from ..sqlgen.brackets import SKETCH_DIALECTS, bracket_fractions, merged, read_segments, segments_query, sketch_accuracy, sketch_query
from ..sqlgen.profile import (
    COLUMNAR_DIALECTS,
    PERCENTILE_DIALECTS,
    counts_query,
    percentiles_query,
    rank_fraction,
    ranks_query,
    read_percentiles,
    read_ranks,
)

PERCENTILE, BRACKETS, WINDOW = "percentile", "brackets", "window"


def engine_route(dialect: str) -> str:
    """PERCENTILE where the engine has an exact percentile aggregate that spills, BRACKETS where it has a
    quantile summary, else WINDOW."""
    if dialect in PERCENTILE_DIALECTS:
        return PERCENTILE
    return BRACKETS if dialect in SKETCH_DIALECTS else WINDOW


def non_null_counts(
    engine: Engine, layout: DesignLayout, columns: Mapping[str, exp.Expression], where: exp.Expression | None = None
) -> dict[str, int]:
    """Per column, its non-NULL values among the rows `where` selects (default: not held out)."""
    (row,) = engine.fetch(counts_query(layout, columns, where))
    return dict(zip(columns, (int(n) for n in row), strict=True))


def values_at_ranks(
    engine: Engine, layout: DesignLayout, columns: Mapping[str, exp.Expression], counts: Mapping[str, int],
    ranks: Mapping[str, Sequence[int]], where: exp.Expression | None = None, route: str | None = None,
) -> dict[str, dict[int, float]]:
    """Per column, its value at each of its `ranks` (1-based, in its `counts` non-NULL values in ascending
    order: `non_null_counts`) among the rows `where` selects; by `route`, by default the engine's
    (`engine_route`). A column without ranks is not read."""
    wanted = {name: tuple(ranks[name]) for name in columns if ranks[name]}
    if not wanted:
        return {name: {} for name in columns}
    found: dict[str, dict[int, float]] = {name: {} for name in columns}
    route = route or engine_route(engine.dialect)
    if route == PERCENTILE:
        groups = [[name] for name in wanted] if engine.dialect in COLUMNAR_DIALECTS else [list(wanted)]
        for group in groups:
            fractions = {name: tuple(rank_fraction(rank, counts[name]) for rank in wanted[name]) for name in group}
            query = percentiles_query(layout, {name: columns[name] for name in group}, fractions, engine.dialect, where)
            values = read_percentiles(fractions, engine.fetch(query)[0])
            found.update({name: dict(zip(wanted[name], values[name], strict=True)) for name in group})
        return found
    if route == BRACKETS:
        bracketed = _bracketed(engine, layout, columns, counts, wanted, where)
        found.update({name: values for name, values in bracketed.items() if values is not None})
        wanted = {name: ranks for name, ranks in wanted.items() if bracketed[name] is None}
    if wanted:  # the window route: chosen, or for the columns whose bracket missed
        query = ranks_query(layout, {name: columns[name] for name in wanted}, wanted, where)
        found.update(read_ranks(wanted, engine.fetch(query)))
    return found


def _bracketed(
    engine: Engine, layout: DesignLayout, columns: Mapping[str, exp.Expression], counts: Mapping[str, int],
    wanted: Mapping[str, Sequence[int]], where: exp.Expression | None,
) -> dict[str, dict[int, float] | None]:
    """Per column of `wanted`, its values at its ranks by the bracketing route (featpipe.sqlgen.brackets);
    None where a bracket missed its value, for the window route to rank."""
    accuracies = {name: sketch_accuracy(counts[name]) for name in wanted}
    fractions = {name: tuple(fraction for rank in ranks for fraction in bracket_fractions(rank, counts[name], accuracies[name]))
                 for name, ranks in wanted.items()}
    bounds = read_percentiles(fractions, engine.fetch(sketch_query(
        layout, {name: columns[name] for name in wanted}, fractions, accuracies, where))[0])
    intervals = {name: merged(list(zip(values[::2], values[1::2], strict=True))) for name, values in bounds.items()
                 if all(math.isfinite(value) for value in values)}  # an infinite or NaN value: the window route ranks it
    found: dict[str, dict[int, float] | None] = {name: None for name in wanted}
    if intervals:
        query = segments_query(layout, {name: columns[name] for name in intervals}, intervals, where)
        found.update(read_segments({name: wanted[name] for name in intervals}, engine.fetch(query)))
    return found
