"""The group table query: a model's scored rows counted per value of one group column, in one pass.

A group column (`groups:` in the spec) is never a term; it is read from the table the rows were
scored from, joined on the key. Per group (NULL is a group of its own, as GROUP BY makes it):

    rows, observed_sum, predicted_sum, flagged (rows predicted at or above the threshold, binomial)
    and twice_rank_sum (binomial: twice the Mann-Whitney rank sum of the events, ranked within the group)

The ranks are those of featpipe.sqlgen.metrics.binomial_summary_query (2 RANK() + tied - 1, exact
integers), taken with PARTITION BY the group, so each group's AUC is its own Mann-Whitney AUC.

Example:
    >>> rows = scored_holdout(layout, coefficients)                                    # doctest: +SKIP
    >>> query = group_query(rows, "leases", "lease_id", "region", "binomial", 0.5)   # doctest: +SKIP
"""

from __future__ import annotations

from sqlglot import exp

from ..project.names import ROWS, table_reference
from .common import alias, column, count_if, number
from .families import sums_family
from .metrics import ETA, KEY, OBSERVED, PREDICTED, TWICE_RANK, prediction

GROUP = "_group"
SCORED, SOURCE = "_scored", "_source"
GROUP_COLUMNS = (GROUP, ROWS, "observed_sum", "predicted_sum", "flagged", "twice_rank_sum")


def group_value(name: str) -> exp.Expression:
    """The group column as text, so every engine returns and orders the same labels."""
    return exp.cast(column(name, SOURCE), exp.DataType.build("VARCHAR"))


def group_query(rows: exp.Select, table: str, key: str, group: str, family: str, threshold: float) -> exp.Select:
    """Per value of `group` in `table` (joined to `rows`, a KEY, OBSERVED, ETA query, on `key`): the
    GROUP_COLUMNS sums. flagged and twice_rank_sum are 0 for a family other than binomial."""
    binomial = sums_family(family) == "binomial"
    joined = exp.select(
        alias(column(OBSERVED, SCORED), OBSERVED),
        alias(prediction(family, column(ETA, SCORED)), PREDICTED),
        alias(group_value(group), GROUP),
    ).from_(rows.subquery(SCORED)).join(
        table_reference(table, "--table").as_(SOURCE),
        on=exp.EQ(this=column(KEY, SCORED), expression=column(key, SOURCE)),
    )
    by_prediction = exp.Order(expressions=[exp.Ordered(this=column(PREDICTED))])
    rank = exp.Window(this=exp.Rank(), partition_by=[column(GROUP)], order=by_prediction)
    tied = exp.Window(this=exp.Count(this=exp.Star()), partition_by=[column(GROUP), column(PREDICTED)])
    twice_rank = exp.Sub(this=exp.Add(this=exp.Mul(this=exp.Literal.number(2), expression=rank), expression=tied),
                         expression=exp.Literal.number(1))
    ranked = exp.select(column(GROUP), column(OBSERVED), column(PREDICTED),
                        alias(twice_rank if binomial else exp.Literal.number(0), TWICE_RANK)).from_(joined.subquery("_joined"))
    event = exp.EQ(this=column(OBSERVED), expression=number(1.0))
    flagged = exp.GTE(this=column(PREDICTED), expression=number(threshold)) if binomial else exp.false()
    return (
        exp.select(
            column(GROUP),
            alias(exp.Count(this=exp.Star()), ROWS),
            alias(exp.Sum(this=column(OBSERVED)), "observed_sum"),
            alias(exp.Sum(this=column(PREDICTED)), "predicted_sum"),
            alias(count_if(flagged), "flagged"),
            alias(exp.Sum(this=exp.Case().when(event, column(TWICE_RANK)).else_(exp.Literal.number(0))), "twice_rank_sum"),
        )
        .from_(ranked.subquery("_ranked"))
        .group_by(column(GROUP))
    )
