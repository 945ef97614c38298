"""Queries of a grouped binomial model (successes out of trials): the training rows counted per distinct
(proportion, trials) pair, what the log-likelihood's binomial constant and the count checks need; and
scored rows unrolled into trials, so the holdout metrics read each trial as a 0/1 row."""

from __future__ import annotations

from sqlglot import exp

from ..compiler.layout import DesignLayout
from .common import alias, column, double, number, training_rows
from .metrics import COUNTED, ETA, KEY, OBSERVED


def trial_counts_query(layout: DesignLayout) -> exp.Select:
    """Rows per distinct (target proportion, trials) on the training rows; the weight column holds the trials."""
    projections = [alias(double(column(layout.target)), "_y"), alias(double(column(layout.weight)), "_n"), exp.Count(this=exp.Star())]
    query = exp.select(*projections).from_(exp.to_table(layout.table)).where(training_rows(layout))
    return query.group_by(exp.Literal.number(1), exp.Literal.number(2))


def as_trials(rows: exp.Select) -> exp.Select:
    """Scored rows (KEY, OBSERVED the share of successes, ETA, COUNTED the trials) as two counted 0/1 rows
    each: the successes (OBSERVED 1) and the failures (OBSERVED 0), counted as whole numbers of trials."""
    scored = rows.subquery("_grouped")
    successes = exp.Round(this=exp.Mul(this=column(OBSERVED), expression=column(COUNTED)))
    failures = exp.Round(this=exp.Mul(this=exp.Paren(this=exp.Sub(this=number(1.0), expression=column(OBSERVED))), expression=column(COUNTED)))

    def part(observed: float, counted: exp.Expression) -> exp.Select:
        return exp.select(column(KEY), alias(number(observed), OBSERVED), column(ETA), alias(counted, COUNTED)).from_(scored.copy())

    return exp.union(part(1.0, successes), part(0.0, failures), distinct=False)
