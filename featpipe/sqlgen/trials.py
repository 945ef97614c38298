"""The training rows of a grouped binomial fit counted per distinct (proportion, trials) pair: what the
log-likelihood's binomial constant and the count checks need, as one small grouped query."""

from __future__ import annotations

from sqlglot import exp

from ..compiler.layout import DesignLayout
from .common import alias, column, double, training_rows


def trial_counts_query(layout: DesignLayout) -> exp.Select:
    """Rows per distinct (target proportion, trials) on the training rows; the weight column holds the trials."""
    projections = [alias(double(column(layout.target)), "_y"), alias(double(column(layout.weight)), "_n"), exp.Count(this=exp.Star())]
    query = exp.select(*projections).from_(exp.to_table(layout.table)).where(training_rows(layout))
    return query.group_by(exp.Literal.number(1), exp.Literal.number(2))
