"""The drift query of a fitted model: one pass over a batch, counted in the training bins, with the PSI.

It takes plain data: the model as the scoring query takes it (featpipe.sqlgen.score.ScoringModel) and
the monitored quantities, every term then the linear predictor, each with its training profile
(featpipe.fitted.drift.monitored takes them from a fitted file). The batch is read through the scoring
query's own steps (term_values, checked_terms, contributions), so every term value and the linear
predictor are computed exactly as scoring computes them, from the fitted file alone. The
contributions step additionally carries the term values, and then:

    drift_counts   one row: the batch's rows and, for each term and for the linear predictor, the
                   rows per training bin, NULLs, values below the training minimum and above the
                   training maximum, the mean value and (terms) the mean contribution
    drift_shares   the same row plus every bin's share of the batch's rows, floored (empty-bin rule)
    final SELECT   the counts, means and the population stability index of each term and the score

Bins are the training profile's (featpipe.sqlgen.profile.Profile): bin 1 holds v <= edges[0], bin i holds
edges[i-2] < v <= edges[i-1], the last bin v > edges[-1]; NULL is a bin of its own (a missing value is
a category of its own, common practice in credit scoring). Expected shares are the training rows'
shares of these bins counting the training NULLs, written into the query as literals.

    PSI = SUM over bins of (actual - expected) * LN(actual / expected)

Empty-bin rule (common practice): a share below EMPTY_SHARE (0.0001) counts as 0.0001, for the
expected and the actual share alike, so an empty bin adds a finite amount. The floored shares are not
renormalised. LN then always sees a positive ratio, so it needs no guard.

The score's bins are the linear predictor's: the prediction is a monotone function of it, so it falls
into the same bins. A term's mean contribution is the batch mean of coefficient * (value - training
mean) over the rows where the term is not NULL, the rows its training mean was taken over; in training
it is 0 by construction, so the batch value is the shift itself.

Output columns are named in featpipe.project.names: `rows`, then per monitored name `<name>__bin_<i>`,
`<name>__nulls`, `<name>__below_min`, `<name>__above_max`, `<name>__mean`, for terms
`<name>__mean_contribution`, and `<name>__psi`.

Example:
    >>> model, items = scoring_model(fitted), monitored(fitted)           # doctest: +SKIP
    >>> query = drift_query(model, items, table="leases_2024_06")         # doctest: +SKIP
    >>> row = dict(zip(output_names(query), engine.fetch(query)[0]))     # doctest: +SKIP
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlglot import exp

from ..project.names import (
    LINEAR_PREDICTOR,
    NULL_BIN,
    ROWS,
    above_column,
    below_column,
    bin_column,
    mean_column,
    mean_contribution_column,
    psi_column,
    share_column,
)
from .common import alias, column, count_if, double, null_count, number
from .profile import Profile
from .score import CONTRIBUTIONS, TERM_VALUES, ScoringModel, score_query

EMPTY_SHARE = 0.0001
COUNTS, SHARES = "drift_counts", "drift_shares"


@dataclass(frozen=True)
class Category:
    """A bin of a LEVELS term: the levels it holds and their share of the training rows."""

    label: str
    levels: tuple[str, ...]
    expected: float


@dataclass(frozen=True)
class Monitored:
    """One profiled quantity of the model: a term (with its coefficient) or the linear predictor.

    A learned term is read from the scoring query's columns: `value` names the one binned (its argument,
    or CAPPED's one column) and `parts` its design columns (name, coefficient, training mean), whose
    centred sum is its contribution. A LEVELS term is binned by `categories` (each level with a column
    and the reference, then `other`), then the levels never seen in training (`unseen`), instead of
    deciles; its training NULL share is `null_share`.
    """

    name: str
    profile: Profile | None
    estimate: float | None = None  # None for the linear predictor
    value: str | None = None
    parts: tuple[tuple[str, float, float], ...] = ()
    categories: tuple[Category, ...] = ()
    null_share: float = 0.0

    @property
    def bins(self) -> int:
        return len(self.categories) + 1 if self.categories else len(self.profile.edges) + 1

    @property
    def column(self) -> str:
        return self.value or self.name

    def expected(self) -> tuple[float, ...]:
        """Training share of every bin, the NULL bin last (`unseen` holds no training row)."""
        if self.categories:
            return (*(category.expected for category in self.categories), 0.0, self.null_share)
        return expected_shares(self.profile)


def expected_shares(profile: Profile) -> tuple[float, ...]:
    """Training share of every bin among all training rows, NULLs included, the NULL bin last.

    The profile keeps shares among the non-NULL rows; times `count` they are whole rows again.
    """
    rows = profile.count + profile.nulls
    if rows == 0:
        raise ValueError("a profile of no rows has no shares")
    counts = [round(share * profile.count) for share in profile.shares] or [0]
    return (*(count / rows for count in counts), profile.nulls / rows)


def floored(share: float) -> float:
    """The empty-bin rule: a share below EMPTY_SHARE counts as EMPTY_SHARE (common practice)."""
    return max(share, EMPTY_SHARE)


def drift_query(model: ScoringModel, items: tuple[Monitored, ...], *, table: str | None = None) -> exp.Select:
    """The drift SELECT of `model` over `table` (default: `model.table`): one row of counts and PSIs.

    `items` are the model's terms in model order, then the linear predictor.
    """
    expected = [*model.groups, LINEAR_PREDICTOR]
    if [item.name for item in items] != expected:
        raise ValueError(f"monitored items {[item.name for item in items]} are not the terms and score {expected}")
    scoring = score_query(model, table=table)
    steps = [(cte.alias, cte.this.copy()) for cte in scoring.ctes]
    if steps[-1][0] != CONTRIBUTIONS:
        raise ValueError(f"the scoring query's last step is {steps[-1][0]}, not {CONTRIBUTIONS}")
    carried_values = dict.fromkeys(name for item in items[:-1] for name in (item.column, *(part[0] for part in item.parts)))
    steps[-1] = (CONTRIBUTIONS, steps[-1][1].select(*map(column, carried_values), copy=False))

    counted = [alias(exp.Count(this=exp.Star()), ROWS)]
    for item in items:
        counted += _counts(item)
    steps.append((COUNTS, exp.select(*counted).from_(exp.to_table(CONTRIBUTIONS))))

    carried = [column(name) for name in output_names(exp.select(*counted))]
    shares = [alias(_floored_share(bin_column(item.name, index)), share_column(item.name, index))
              for item in items for index in _bin_indexes(item)]
    steps.append((SHARES, exp.select(*carried, *shares).from_(exp.to_table(COUNTS))))

    psis = [alias(_psi(item), psi_column(item.name)) for item in items]
    query = exp.select(*(c.copy() for c in carried), *psis).from_(exp.to_table(SHARES))
    for name, step in steps:
        query = query.with_(name, as_=step, copy=False)
    return query


def output_names(query: exp.Select) -> list[str]:
    """The column names of a query's result, in order."""
    return [projection.alias_or_name for projection in query.expressions]


def _bin_indexes(item: Monitored) -> list[int | str]:
    return [*range(1, item.bins + 1), NULL_BIN]


def _counts(item: Monitored) -> list[exp.Expression]:
    if item.categories:
        return _category_counts(item)
    value = column(item.column)
    edges = item.profile.edges
    counts = []
    for index in range(1, item.bins + 1):
        above_previous = exp.GT(this=value.copy(), expression=number(edges[index - 2])) if index > 1 else None
        up_to_edge = exp.LTE(this=value.copy(), expression=number(edges[index - 1])) if index <= len(edges) else None
        inside = [test for test in (above_previous, up_to_edge) if test is not None]
        condition = exp.and_(*inside) if inside else value.copy().is_(exp.null()).not_()
        counts.append(alias(count_if(condition), bin_column(item.name, index)))
    counts.append(alias(null_count(value.copy()), bin_column(item.name, NULL_BIN)))
    low, high = item.profile.min, item.profile.max
    never = exp.false()
    counts.append(alias(count_if(never if low is None else exp.LT(this=value.copy(), expression=number(low))),
                        below_column(item.name)))
    counts.append(alias(count_if(never.copy() if high is None else exp.GT(this=value.copy(), expression=number(high))),
                        above_column(item.name)))
    counts.append(alias(exp.Avg(this=value.copy()), mean_column(item.name)))
    if item.estimate is not None:
        centred = exp.Paren(this=exp.Sub(this=value.copy(), expression=number(item.profile.mean)))
        counts.append(alias(exp.Avg(this=exp.Mul(this=number(item.estimate), expression=centred)),
                            mean_contribution_column(item.name)))
    elif item.parts:
        counts.append(_mean_contribution(item))
    return counts


def _category_counts(item: Monitored) -> list[exp.Expression]:
    """A LEVELS term's rows per category, then unseen levels, NULLs; no range and no mean of text."""
    value = column(item.column)
    seen = [level for category in item.categories for level in category.levels]
    counts = [alias(count_if(_one_of(value, category.levels)), bin_column(item.name, index))
              for index, category in enumerate(item.categories, start=1)]
    unseen = exp.and_(value.copy().is_(exp.null()).not_(), exp.Not(this=_one_of(value, seen)))
    counts.append(alias(count_if(unseen), bin_column(item.name, len(item.categories) + 1)))
    counts.append(alias(null_count(value.copy()), bin_column(item.name, NULL_BIN)))
    counts.append(alias(count_if(exp.false()), below_column(item.name)))
    counts.append(alias(count_if(exp.false()), above_column(item.name)))
    counts.append(alias(exp.cast(exp.null(), exp.DataType.build("DOUBLE")), mean_column(item.name)))
    counts.append(_mean_contribution(item))
    return counts


def _one_of(value: exp.Expression, levels: tuple[str, ...] | list[str]) -> exp.Expression:
    return exp.In(this=value.copy(), expressions=[exp.Literal.string(level) for level in levels])


def _mean_contribution(item: Monitored) -> exp.Expression:
    """The batch mean of a learned term's contribution: its columns' coefficient * (value - training mean),
    summed, over the rows where they are not NULL (all of a term's columns are NULL together)."""
    total: exp.Expression | None = None
    for name, estimate, mean in item.parts:
        part = exp.Mul(this=number(estimate), expression=exp.Paren(this=exp.Sub(this=column(name), expression=number(mean))))
        total = part if total is None else exp.Add(this=total, expression=part)
    return alias(exp.Avg(this=total), mean_contribution_column(item.name))


def unseen_levels_query(model: ScoringModel, items: tuple[Monitored, ...], *, table: str | None = None) -> exp.Query | None:
    """(term, level, rows) of every level of a LEVELS term in the batch that training never saw, most
    rows first; None when the model has no LEVELS term."""
    levelled = [item for item in items if item.categories]
    if not levelled:
        return None
    scoring = score_query(model, table=table)
    values = next(cte.this.copy() for cte in scoring.ctes if cte.alias == TERM_VALUES)
    branches = []
    for item in levelled:
        value = column(item.column)
        seen = [level for category in item.categories for level in category.levels]
        branches.append(exp.select(alias(exp.Literal.string(item.name), "term"), alias(value, "level"),
                                   alias(exp.Count(this=exp.Star()), ROWS))
                        .from_(exp.to_table(TERM_VALUES))
                        .where(exp.and_(value.copy().is_(exp.null()).not_(), exp.Not(this=_one_of(value, seen))))
                        .group_by(value.copy()))
    query = branches[0]
    for branch in branches[1:]:
        query = exp.union(query, branch, distinct=False)
    ordered = exp.select("*").from_(query.subquery("unseen")).order_by(
        exp.Ordered(this=column("term")), exp.Ordered(this=column(ROWS), desc=True), exp.Ordered(this=column("level")))
    return ordered.with_(TERM_VALUES, as_=values, copy=False)


def _floored_share(count_name: str) -> exp.Expression:
    """count / rows as DOUBLE, floored at EMPTY_SHARE; NULL for a batch of no rows."""
    share = exp.Div(this=double(column(count_name)), expression=exp.Nullif(this=double(column(ROWS)), expression=number(0.0)))
    return exp.Case().when(exp.LT(this=share, expression=number(EMPTY_SHARE)), number(EMPTY_SHARE)).else_(share.copy())


def _psi(item: Monitored) -> exp.Expression:
    total: exp.Expression | None = None
    for index, expected in zip(_bin_indexes(item), item.expected(), strict=True):
        actual, reference = column(share_column(item.name, index)), number(floored(expected))
        part = exp.Mul(this=exp.Paren(this=exp.Sub(this=actual, expression=reference)),
                       expression=exp.Ln(this=exp.Div(this=actual.copy(), expression=reference.copy())))
        total = part if total is None else exp.Add(this=total, expression=part)
    return total
