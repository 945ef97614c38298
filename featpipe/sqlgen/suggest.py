"""The queries of `featpipe suggest`, all over a model's training rows computed from its input table.

The training rows are the design table's (not held out, no NULL in target, offset, weight or any
model term), computed by the design query itself with more columns beside it, so the candidates and
the current model read the very same rows. Only sums and a few order statistics leave the engine:

- `column_summary_query`: one scan; per numeric column its count, sum, min, max and nine deciles
  (exact, PERCENTILE_DISC: the inverted empirical CDF, as the fitted profiles use); on engines whose
  exact percentile aggregate holds every distinct value in memory (Spark) or that have none (SQLite),
  the deciles come from a second scan, `column_ranks_query`: the window route of the profiles over
  the same rows, the values at ranks ceil(k n / 10) that PERCENTILE_DISC(k / 10) gives elsewhere;
- `level_counts_query`: one scan; the text levels with at least `min_rows` training rows, all text
  columns at once through GROUPING SETS (each result row has one column set, the others NULL);
- `candidate_means_query`: the mean of each candidate over the first `rows` training rows (a LIMIT, not
  a scan): the shift that keeps the score sums free of cancellation;
- `score_sums_query`: one scan per chunk of candidates; the current model's design columns (a learned
  term expanded into its columns from the constants in the fitted file) and linear predictor from its
  fitted coefficients (as scoring computes them), its fitted mean, working weight and residual, and
  as SUMs: the model's score and X'WX (first chunk only) and per candidate the sums its score test needs.

Portability (sqlgen/harden.py): terms and candidates are hardened DOUBLE expressions, the linear
predictor is clamped before EXP, every literal is an exact DOUBLE.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from functools import reduce

from sqlglot import exp

from ..compiler import CompiledModel
from ..project import InputSpec
from ..project.names import INTERCEPT
from .common import alias, column, double, number, training_rows
from .design import design_query
from .learned import design_columns
from .metrics import linear_predictor, prediction
from .profile import NAME, VALUE, stacked_ranks_query
from .score import ScoringModel, ScoringTerm
from .statistics import upper_pairs

DECILE_LEVELS = tuple(k / 10 for k in range(1, 10))
RESIDUAL, WORKING, ERROR = "_residual", "_working", "_error"


def training_input(model: CompiledModel, source: InputSpec, extra: Mapping[str, exp.Expression]) -> exp.Select:
    """The design query's columns and `extra` (alias -> expression over the input) on the training rows."""
    inner = design_query(model, source).select(*(alias(expression, name) for name, expression in extra.items()))
    return exp.select(exp.Star()).from_(inner.subquery("_input")).where(training_rows(model.layout))


def _in(index: int) -> str:
    return f"_in{index}"


def numeric_input(model: CompiledModel, source: InputSpec, columns: Sequence[str]) -> exp.Subquery:
    """The training rows with each of `columns` as DOUBLE, named by its position (`_in0`, `_in1`, ...)."""
    return training_input(model, source, {_in(i): double(column(name)) for i, name in enumerate(columns)}).subquery("_training")


def column_summary_query(model: CompiledModel, source: InputSpec, columns: Sequence[str], deciles: bool = True) -> exp.Select:
    """COUNT(*), then per column: count, sum, min, max and (`deciles`) the deciles at DECILE_LEVELS (read
    with `read_column_summaries`)."""
    projections: list[exp.Expression] = [exp.Count(this=exp.Star())]
    for index in range(len(columns)):
        value = column(_in(index))
        projections += [exp.Count(this=value.copy()), exp.Sum(this=value.copy()), exp.Min(this=value.copy()), exp.Max(this=value.copy())]
        projections += [
            exp.WithinGroup(this=exp.PercentileDisc(this=exp.Literal.number(level)),
                            expression=exp.Order(expressions=[exp.Ordered(this=value.copy())]))
            for level in (DECILE_LEVELS if deciles else ())
        ]
    return exp.select(*projections).from_(numeric_input(model, source, columns))


def read_column_summaries(row: Sequence, columns: Sequence[str], deciles: bool = True):
    """(training rows, per column (count, sum, min, max, deciles)) from the row of `column_summary_query`;
    without `deciles` their tuples are empty."""
    rows = int(row[0] or 0)
    width = 4 + (len(DECILE_LEVELS) if deciles else 0)
    found = {}
    for index, name in enumerate(columns):
        count, total, low, high, *values = row[1 + width * index : 1 + width * (index + 1)]
        found[name] = (int(count or 0), None if total is None else float(total), None if low is None else float(low),
                       None if high is None else float(high), tuple(sorted({float(d) for d in values if d is not None})))
    return rows, found


def column_ranks_query(model: CompiledModel, source: InputSpec, columns: Sequence[str], ranks: Mapping[str, Sequence[int]]) -> exp.Select:
    """The values at `ranks` of the columns that have some (read with featpipe.sqlgen.profile.read_ranks),
    in one scan: each training row is repeated once per column (a cross join with their names) and
    stacked as (name, value), rather than the training rows computed once per column."""
    wanted = [(index, name) for index, name in enumerate(columns) if ranks.get(name)]
    names = reduce(lambda left, right: exp.union(left, right, distinct=False),
                   [exp.select(alias(exp.Literal.string(name), NAME)) for _, name in wanted])
    value = exp.Case(this=column(NAME))
    for index, name in wanted:
        value = value.when(exp.Literal.string(name), column(_in(index)))
    stacked = (exp.select(column(NAME), alias(value, VALUE)).from_(numeric_input(model, source, columns))
               .join(names.subquery("_names"), join_type="CROSS"))
    return stacked_ranks_query(stacked, {name: ranks[name] for _, name in wanted})


def level_counts_query(model: CompiledModel, source: InputSpec, columns: Sequence[str], min_rows: int) -> exp.Select:
    """The (column values..., rows) of every text level with at least `min_rows` training rows."""
    rows = training_input(model, source, {_in(i): column(name) for i, name in enumerate(columns)})
    keys = [column(_in(i)) for i in range(len(columns))]
    grouping = exp.GroupingSets(expressions=[exp.Tuple(expressions=[key.copy()]) for key in keys])
    count = exp.Count(this=exp.Star())
    return (exp.select(*keys, count).from_(rows.subquery("_training")).group_by(grouping)
            .having(exp.GTE(this=count.copy(), expression=exp.Literal.number(min_rows))))


def read_levels(rows: Sequence[tuple], columns: Sequence[str]) -> dict[str, list[str]]:
    """Per column, its frequent levels sorted by rows (most first), then by value."""
    found: dict[str, list[tuple[int, str]]] = {name: [] for name in columns}
    for row in rows:
        *values, count = row
        for name, value in zip(columns, values, strict=True):
            if value is not None:
                found[name].append((-int(count), str(value)))
    return {name: [value for _, value in sorted(levels)] for name, levels in found.items() if levels}


def candidate_means_query(model: CompiledModel, source: InputSpec, candidates: Mapping[str, exp.Expression], rows: int) -> exp.Select:
    """AVG of each candidate over the first `rows` training rows (NULL when it has no value there)."""
    sample = training_input(model, source, candidates).limit(rows)
    return exp.select(*(exp.Avg(this=column(name)) for name in candidates)).from_(sample.subquery("_sample"))


def model_column_values(terms: Sequence[ScoringTerm]) -> list[exp.Expression]:
    """The fit's design columns over the design query's columns, one per scoring term: a term's own
    column, or a learned term's column from its argument and the constants in the fitted file (as
    scoring computes it)."""
    return [design_columns(term.learned, column(term.group))[term.index] if term.learned is not None else column(term.name)
            for term in terms]


def score_sums_query(
    model: CompiledModel,
    source: InputSpec,
    fit: ScoringModel,
    candidates: Mapping[str, exp.Expression],
    shifts: Mapping[str, float],
    *,
    with_model: bool,
) -> exp.Select:
    """One scan of the training rows under the current fit `fit` (the fitted file as scoring reads it).

    With prior weight w, working weight W = w V(mu), residual R = w (y - mu), model columns x (the
    intercept, then each design column of the fit minus its training mean: a learned term gives
    several) and each candidate shifted, z = value - shift:

    - with_model: COUNT(*), SUM(w (y - mu)^2), the score SUM(R x_j) and X'WX SUM(W x_i x_j) (`upper_pairs` order);
    - per candidate: COUNT(z) (its rows with a value), SUM(R z), SUM(W z^2), SUM(W z x_j) for each model column.

    A candidate's NULL rows add nothing to its sums: they enter its test at the shift.
    """
    layout = model.layout
    shifted = {name: exp.Sub(this=expression, expression=number(shifts[name])) for name, expression in candidates.items()}
    rows = training_input(model, source, shifted)
    values = [f"_v{i}" for i in range(len(fit.terms))]
    terms = [f"_x{i}" for i in range(len(fit.terms))]
    candidate_names = list(candidates)
    weight = double(column(layout.weight)) if layout.weight else None
    offset = [layout.offset] if layout.offset else []
    level0 = [alias(double(column(layout.target)), "_y"), *(column(name) for name in offset)]
    level0 += [alias(value, name) for value, name in zip(model_column_values(fit.terms), values, strict=True)]
    level0 += [column(name) for name in candidate_names]
    if weight is not None:
        level0.append(alias(weight, "_w"))
    expanded = exp.select(*level0).from_(rows.subquery("_rows"))

    columns_layout = dataclasses.replace(layout, terms=tuple(values))
    coefficients = {INTERCEPT: fit.intercept, **{name: term.estimate for name, term in zip(values, fit.terms, strict=True)}}
    level1 = [column("_y"), alias(linear_predictor(columns_layout, coefficients), "_eta")]
    level1 += [alias(exp.Sub(this=column(value), expression=number(term.mean)), x)
               for value, term, x in zip(values, fit.terms, terms, strict=True)]
    level1 += [column(name) for name in candidate_names]
    if weight is not None:
        level1.append(column("_w"))
    linear = exp.select(*level1).from_(expanded.subquery("_expanded"))
    carried = ["_y", *terms, *candidate_names, *(["_w"] if weight is not None else [])]
    fitted = exp.select(*(column(name) for name in carried), alias(prediction(fit.family, column("_eta")), "_mu")).from_(
        linear.subquery("_linear"))

    mu = column("_mu")
    variance = {"binomial": exp.Mul(this=mu.copy(), expression=exp.Paren(this=exp.Sub(this=number(1.0), expression=mu.copy()))),
                "poisson": mu.copy(), "gaussian": number(1.0)}[fit.family]
    error = exp.Sub(this=column("_y"), expression=exp.Paren(this=mu.copy()))
    level2 = [column(x) for x in terms] + [column(name) for name in candidate_names]
    level2 += [alias(_weighted(variance, weight is not None), WORKING), alias(_weighted(exp.Paren(this=error), weight is not None), RESIDUAL),
               alias(error.copy(), ERROR)]
    working = exp.select(*level2).from_(fitted.subquery("_fitted"))

    W, R = column(WORKING), column(RESIDUAL)
    design = [None, *(column(x) for x in terms)]  # None: the intercept
    sums: list[exp.Expression] = []
    if with_model:
        sums += [exp.Count(this=exp.Star()), exp.Sum(this=_times(R, column(ERROR)))]
        sums += [exp.Sum(this=_times(R, c)) for c in design]
        sums += [exp.Sum(this=_times(W, design[i], design[j])) for i, j in upper_pairs(len(design))]
    for name in candidate_names:
        z = column(name)
        sums += [exp.Count(this=z.copy()), exp.Sum(this=_times(R, z)), exp.Sum(this=_times(W, z, z))]
        sums += [exp.Sum(this=_times(W, z, c)) for c in design]
    return exp.select(*sums).from_(working.subquery("_working"))


def model_sums_width(terms: int) -> int:
    """How many values the model's part of `score_sums_query` returns."""
    return 2 + (terms + 1) + len(upper_pairs(terms + 1))


def candidate_sums_width(terms: int) -> int:
    """How many values each candidate adds to `score_sums_query`."""
    return 3 + (terms + 1)


def _weighted(value: exp.Expression, weighted: bool) -> exp.Expression:
    return exp.Mul(this=column("_w"), expression=value) if weighted else value


def _times(*factors: exp.Expression | None) -> exp.Expression:
    present = [factor.copy() for factor in factors if factor is not None]
    product = present[0]
    for factor in present[1:]:
        product = exp.Mul(this=product, expression=factor)
    return product
