"""Rank statistics of binomial scores as aggregates: the KS gap and DeLong's structural components.

Both read a rows query with the observed 0/1 target in OBSERVED (see featpipe.sqlgen.metrics) and
return one or two rows, whatever the number of scored rows.

KS: the largest gap between the cumulative distributions of the score among events and among
non-events. Rows are grouped by score, counted cumulatively in score order, and the gap at each
score is kept as the integer |events_below * non_events - non_events_below * events| (the caller
divides by events * non_events), so the statistic is exact and the same on every engine. Of equal
gaps the lowest score is reported.

DeLong, DeLong & Clarke-Pearson (Biometrics 1988): each event i has the component V10_i, the share
of non-events scored below it (ties count half), and each non-event j has V01_j, the share of events
scored above it. With twice the average rank of a row among all rows, T, and among the rows of its own
class, C, an event has 2 n0 V10_i = T - C and a non-event 2 n1 (1 - V01_j) = T - C: the integer
D = T - C, from window functions alone (as in Sun & Xu's fast form of the test, IEEE SPL 2014). Per
class the query returns its rows, the sum of D per score and the sum of D_s * D_t per pair of scores,
which is all the AUCs, their variances and their covariance need (featpipe.glm.delong).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from sqlglot import exp

from .common import alias, column, count_if, double, number
from .metrics import OBSERVED, PREDICTED, with_prediction

SCORE, GAP = "_score", "_gap"
EVENTS, NON_EVENTS = "_events", "_non_events"


def ks_query(rows: exp.Select) -> exp.Select:
    """At most one row: the score at the largest gap, that gap times events * non-events, events, non-events.

    `rows` holds KEY, OBSERVED and ETA (featpipe.sqlgen.metrics.scored_holdout); the score is the
    predicted probability. No row when `rows` is empty.
    """
    event = exp.EQ(this=column(OBSERVED), expression=number(1.0))
    grouped = (
        exp.select(
            alias(column(PREDICTED), SCORE),
            alias(count_if(event), EVENTS),
            alias(count_if(exp.not_(event.copy())), NON_EVENTS),
        )
        .from_(with_prediction(rows, "binomial").subquery("_scored"))
        .group_by(column(PREDICTED))
    )
    by_score = exp.Order(expressions=[exp.Ordered(this=column(SCORE))])
    cumulative = exp.select(
        column(SCORE),
        alias(exp.Window(this=exp.Sum(this=column(EVENTS)), order=by_score), "_events_below"),
        alias(exp.Window(this=exp.Sum(this=column(NON_EVENTS)), order=by_score.copy()), "_non_events_below"),
        alias(exp.Window(this=exp.Sum(this=column(EVENTS))), "_all_events"),
        alias(exp.Window(this=exp.Sum(this=column(NON_EVENTS))), "_all_non_events"),
    ).from_(grouped.subquery("_grouped"))
    gap = exp.Abs(this=exp.Sub(
        this=exp.Mul(this=column("_events_below"), expression=column("_all_non_events")),
        expression=exp.Mul(this=column("_non_events_below"), expression=column("_all_events")),
    ))
    return (
        exp.select(alias(column(SCORE), "score"), alias(gap, GAP), alias(column("_all_events"), "events"),
                   alias(column("_all_non_events"), "non_events"))
        .from_(cumulative.subquery("_cumulative"))
        .order_by(exp.Ordered(this=column(GAP), desc=True), exp.Ordered(this=column("score")))
        .limit(1)
    )


@dataclass(frozen=True)
class RankSums:
    """DeLong's components of k scores on the same rows, summed per class (events, non-events).

    `event_sums[s]` is the sum over events of D_s, `event_products[s][t]` the sum of D_s * D_t (and the
    same over non-events); see the module docstring for D.
    """

    events: int
    non_events: int
    event_sums: tuple[int, ...]
    non_event_sums: tuple[int, ...]
    event_products: tuple[tuple[float, ...], ...]
    non_event_products: tuple[tuple[float, ...], ...]


def rank_components_query(rows: exp.Select, scores: Sequence[str]) -> exp.Select:
    """Per class of OBSERVED (0 then 1): rows, the sum of D per score column, and the sum of each product
    D_s * D_t (s <= t, as DOUBLE: the products outgrow integers). `rows` holds OBSERVED and `scores`."""
    differences = [alias(_twice_rank(name, by_class=False), f"_all{index}") for index, name in enumerate(scores)]
    differences += [alias(_twice_rank(name, by_class=True), f"_own{index}") for index, name in enumerate(scores)]
    ranked = exp.select(column(OBSERVED), *differences).from_(rows.subquery("_rows"))
    named = [alias(exp.Sub(this=column(f"_all{index}"), expression=column(f"_own{index}")), f"_d{index}")
             for index in range(len(scores))]
    components = exp.select(column(OBSERVED), *named).from_(ranked.subquery("_ranked"))
    sums = [alias(exp.Sum(this=column(f"_d{index}")), f"_sum{index}") for index in range(len(scores))]
    products = [
        alias(exp.Sum(this=exp.Mul(this=double(column(f"_d{s}")), expression=double(column(f"_d{t}")))), f"_product{s}_{t}")
        for s in range(len(scores)) for t in range(s, len(scores))
    ]
    return (
        exp.select(column(OBSERVED), alias(exp.Count(this=exp.Star()), "_rows"), *sums, *products)
        .from_(components.subquery("_components"))
        .group_by(column(OBSERVED))
        .order_by(column(OBSERVED))
    )


def read_rank_sums(found: Sequence[Sequence], scores: int) -> RankSums | None:
    """The rows of `rank_components_query` as RankSums; None unless both classes are present."""
    by_class = {float(row[0]): row[1:] for row in found}
    if set(by_class) != {0.0, 1.0}:
        return None
    pairs = [(s, t) for s in range(scores) for t in range(s, scores)]

    def sums(row) -> tuple[int, ...]:
        return tuple(int(value) for value in row[1:1 + scores])

    def products(row) -> tuple[tuple[float, ...], ...]:
        found = dict(zip(pairs, (float(value) for value in row[1 + scores:]), strict=True))
        return tuple(tuple(found[min(s, t), max(s, t)] for t in range(scores)) for s in range(scores))

    events, non_events = by_class[1.0], by_class[0.0]
    return RankSums(int(events[0]), int(non_events[0]), sums(events), sums(non_events), products(events), products(non_events))


def _twice_rank(score: str, by_class: bool) -> exp.Expression:
    """Twice the average rank of the row's score (ties share their average rank), among all rows or
    among the rows of its class: 2 RANK() + rows tied - 1, an integer."""
    partition = [column(OBSERVED)] if by_class else []
    rank = exp.Window(this=exp.Rank(), partition_by=partition or None,
                      order=exp.Order(expressions=[exp.Ordered(this=column(score))]))
    tied = exp.Window(this=exp.Count(this=exp.Star()), partition_by=[*partition, column(score)])
    return exp.Sub(this=exp.Add(this=exp.Mul(this=exp.Literal.number(2), expression=rank), expression=tied),
                   expression=exp.Literal.number(1))
