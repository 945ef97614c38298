"""Learned terms in SQL: the queries that learn their constants, and their design columns.

The design table keeps a learned term's argument value (text for LEVELS, DOUBLE otherwise), so
`compute` needs no constants. A fit learns them from the training rows of the design table (not
held out, complete), then expands each learned term into its design columns with the constants
inlined as literals: in a table of columns the statistics query reads, and in the scoring query,
from the same builder (`design_columns`), so training and scoring compute the same columns.

- `levels_query`: rows per level of every LEVELS term, stacked with UNION ALL.
- `quantile_ranks`: the ranks of a BINS, SPLINE or CAPPED term's quantiles among its n training values:
  the inverted empirical CDF, the value at rank ceil(q n) with q exact (`LearnedCall.quantiles`), as
  sqlgen/profile.py; the values at those ranks come from featpipe.fitting.order_statistics (the
  engine's exact percentile aggregate on DuckDB and PostgreSQL, a window it can spill on Spark).

Columns (all DOUBLE, NULL when the argument is NULL):
- LEVELS: one indicator per level with a column; `other` (when it has a column) is 1 for pooled and
  unseen levels; without `other`, an unseen level makes every column NULL (the scoring status says so).
- BINS: indicators of bins 2..m+1 for edges e1 < .. < em; bin i holds e(i-1) < v <= e(i).
- SPLINE: v, then k - 2 restricted cubic spline columns (Harrell, Regression Modeling Strategies,
  2nd ed., eq. 2.25), each divided by (t_k - t_1)^2 so they are on the scale of v.
- CAPPED: v clipped to [low, high].
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from sqlglot import exp

from ..compiler.layout import DesignLayout
from ..compiler.learned import LearnedCall
from .common import alias, column, holdout_rows, number, training_rows
from .profile import quantile_rank

NAME, LEVEL, ROWS = "_name", "_level", "_rows"
OTHER = "other"  # the label of the pooled levels' column


@dataclass(frozen=True)
class LearnedConstants:
    """What a fit learned for one learned term.

    LEVELS: `levels` every training level with its rows (most frequent first, ties by level), the
    `reference` level, `columns` the levels with a column (in `levels` order, then OTHER when pooled
    levels hold at least min_rows), `pooled` the levels below min_rows. Others: `values`, the edges
    (distinct), knots or caps.
    """

    call: LearnedCall
    levels: tuple[tuple[str, int], ...] = ()
    reference: str | None = None
    columns: tuple[str, ...] = ()
    pooled: tuple[str, ...] = ()
    values: tuple[float, ...] = ()

    @property
    def labels(self) -> tuple[str, ...]:
        """One label per design column."""
        function = self.call.function
        if function == "LEVELS":
            return self.columns
        if function == "BINS":
            return tuple(f"bin {i + 1}" for i in range(1, len(self.values) + 1))
        if function == "SPLINE":
            return ("linear",) + tuple(f"spline {j}" for j in range(1, len(self.values) - 1))
        return ("capped",)


def levels_query(layout: DesignLayout, terms: Sequence[str]) -> exp.Query:
    """(term, level, rows) for every LEVELS term on the training rows, NULL levels left out."""
    branches = [
        exp.select(alias(exp.Literal.string(name), NAME), alias(column(name), LEVEL), alias(exp.Count(this=exp.Star()), ROWS))
        .from_(exp.to_table(layout.table))
        .where(training_rows(layout))
        .group_by(column(name))
        for name in terms
    ]
    query = branches[0]
    for branch in branches[1:]:
        query = exp.union(query, branch, distinct=False)
    return query


def quantile_ranks(call: LearnedCall, n: int) -> tuple[int, ...]:
    """The ranks (1-based, in `quantiles()` order) of the term's quantiles among n sorted values; none for n = 0."""
    return tuple(quantile_rank(q, n) for q in call.quantiles()) if n else ()


def unseen_holdout_query(layout: DesignLayout, constants: Mapping[str, LearnedConstants]) -> exp.Select:
    """One row: per LEVELS term in `constants`, the complete holdout rows whose level no training row had."""
    counts = []
    for name, found in constants.items():
        unseen = exp.and_(holdout_rows(layout), exp.Not(this=_one_of(column(name), [level for level, _ in found.levels])))
        counts.append(alias(exp.Sum(this=exp.Case().when(unseen, exp.Literal.number(1)).else_(exp.Literal.number(0))), name))
    return exp.select(*counts).from_(exp.to_table(layout.table))


def read_levels(call: LearnedCall, counted: Sequence[tuple[str, int]]) -> LearnedConstants:
    """LEVELS constants from (level, rows): the most frequent level is the reference; levels below
    min_rows pool into `other`, which gets a column when it holds at least min_rows rows."""
    min_rows = int(call.arguments[0])
    levels = tuple(sorted(((str(level), int(rows)) for level, rows in counted), key=lambda item: (-item[1], item[0])))
    if not levels:
        return LearnedConstants(call)
    reference = levels[0][0]
    kept = tuple(level for level, rows in levels[1:] if rows >= min_rows)
    pooled = tuple(level for level, rows in levels[1:] if rows < min_rows)
    other = sum(rows for level, rows in levels if level in pooled) >= min_rows
    return LearnedConstants(call, levels, reference, kept + ((OTHER,) if other else ()), pooled)


def read_quantiles(call: LearnedCall, values: Sequence[float]) -> LearnedConstants:
    """Edges (distinct: equal edges merge), knots (distinct) or caps from the term's quantiles."""
    values = tuple(float(v) for v in values)
    if call.function in ("BINS", "SPLINE"):
        values = tuple(sorted(set(values)))
    return LearnedConstants(call, values=values)


def design_columns(constants: LearnedConstants, value: exp.Expression) -> list[exp.Expression]:
    """The term's design columns (DOUBLE) computed from its argument `value`, one per label."""
    function = constants.call.function
    if function == "LEVELS":
        return _levels_columns(constants, value)
    if function == "BINS":
        return _bins_columns(constants.values, value)
    if function == "SPLINE":
        return _spline_columns(constants.values, value)
    low, high = constants.values
    return [exp.Case(ifs=[exp.If(this=exp.LT(this=value.copy(), expression=number(low)), true=number(low)),
                          exp.If(this=exp.GT(this=value.copy(), expression=number(high)), true=number(high))],
                     default=value.copy())]


def _one_of(value: exp.Expression, levels: Sequence[str]) -> exp.Expression:
    return exp.In(this=value.copy(), expressions=[exp.Literal.string(level) for level in levels])


def _case(*pairs: tuple[exp.Expression, exp.Expression]) -> exp.Case:
    return exp.Case(ifs=[exp.If(this=condition, true=then) for condition, then in pairs])


def _levels_columns(constants: LearnedConstants, value: exp.Expression) -> list[exp.Expression]:
    seen = [level for level, _ in constants.levels]
    named = [level for level in seen if level not in constants.pooled]  # reference and levels with a column
    has_other = OTHER in constants.columns
    # Without an `other` column, a level never seen in training has no value: NULL, scored as unseen.
    known = value.is_(exp.null()).not_() if has_other else _one_of(value, seen)
    columns = []
    for label in constants.columns:
        if label == OTHER:
            columns.append(_case((_one_of(value, named), number(0.0)), (known.copy(), number(1.0))))
        else:
            hit = exp.EQ(this=value.copy(), expression=exp.Literal.string(label))
            columns.append(_case((hit, number(1.0)), (known.copy(), number(0.0))))
    return columns


def _bins_columns(edges: Sequence[float], value: exp.Expression) -> list[exp.Expression]:
    known = value.is_(exp.null()).not_()
    columns = []
    for index, low in enumerate(edges):
        inside = exp.GT(this=value.copy(), expression=number(low))
        if index + 1 < len(edges):
            inside = exp.and_(inside, exp.LTE(this=value.copy(), expression=number(edges[index + 1])))
        columns.append(_case((inside, number(1.0)), (known.copy(), number(0.0))))
    return columns


def _cube_above(value: exp.Expression, knot: float) -> exp.Expression:
    """(v - knot)^3 where v > knot, else 0 (products, not POWER: exact alike on every engine)."""
    difference = exp.Paren(this=exp.Sub(this=value.copy(), expression=number(knot)))
    cube = exp.Mul(this=exp.Mul(this=difference, expression=difference.copy()), expression=difference.copy())
    return exp.Case(ifs=[exp.If(this=exp.GT(this=value.copy(), expression=number(knot)), true=cube)], default=number(0.0))


def spline_basis_weights(knots: Sequence[float]) -> list[tuple[float, float, float]]:
    """Per spline column j: the weights of (v - t_j)^3+, (v - t_{k-1})^3+ and (v - t_k)^3+ (Harrell eq. 2.25,
    divided by (t_k - t_1)^2)."""
    *_, before_last, last = knots
    scale = (last - knots[0]) ** 2
    return [(1.0 / scale, -(last - t) / (last - before_last) / scale, (before_last - t) / (last - before_last) / scale)
            for t in knots[:-2]]


def _spline_columns(knots: Sequence[float], value: exp.Expression) -> list[exp.Expression]:
    columns = [value.copy()]
    for t, (a, b, c) in zip(knots, spline_basis_weights(knots)):
        parts = [exp.Mul(this=number(weight), expression=_cube_above(value, knot))
                 for weight, knot in ((a, t), (b, knots[-2]), (c, knots[-1]))]
        total = exp.Add(this=exp.Add(this=parts[0], expression=parts[1]), expression=parts[2])
        columns.append(exp.Case(ifs=[exp.If(this=value.copy().is_(exp.null()), true=exp.Null())], default=total))
    return columns
