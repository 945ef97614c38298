"""The middle term of the sandwich estimator as one query: per cluster a grouped pass, then the sum of
outer products of the per-cluster score sums.

A row's score contribution at the fitted coefficients is w (y - mu) x on the working scale (the same
residual `statistics_query` sums for IRLS, times the standardized design row). Grouped by cluster and
summed, each cluster gives one score vector s_g; the middle term is sum over clusters of s_g s_g'
(upper triangle, intercept first, in `upper_pairs` order). With every row its own cluster (grouped by
the key) this is the heteroskedasticity-consistent middle term, sum of u_i u_i'.

The query returns one row: the number of clusters, whether any row had a NULL cluster, then the
triangle. Only these p (p + 1) / 2 sums leave the engine.
"""

from __future__ import annotations

from collections.abc import Mapping

from sqlglot import exp

from ..compiler.layout import DesignLayout
from .common import alias, column, number
from .statistics import ModelRequest, statistics_query, upper_pairs


def sandwich_query(
    layout: DesignLayout,
    family: str,
    centers: Mapping[str, float],
    scales: Mapping[str, float],
    model: ModelRequest,
    *,
    eta_limit: float | None,
    boundary_eta: float,
    power: float | None = None,
    by_cluster: bool = False,
) -> exp.Select:
    """Clusters, NULL-cluster flag and the upper triangle of sum_g s_g s_g' for `model` at its coefficients.

    Rows are grouped by `layout.cluster` with `by_cluster`, else by the key (every row its own cluster).
    """
    grouping = column(layout.cluster if by_cluster else layout.key)
    grouped = statistics_query(layout, family, centers, scales, [model], eta_limit=eta_limit,
                               boundary_eta=boundary_eta, group=grouping, power=power)
    size = len(model.terms) + 1
    # The grouped row is: group value, deviance, boundary, then the score sums (see `statistics_query`).
    scores = grouped.expressions[3 : 3 + size]
    names = [f"_s{index}" for index in range(size)]
    grouped.set("expressions", [alias(column("_group"), "_group")] + [alias(score, name) for score, name in zip(scores, names, strict=True)])
    null_group = exp.Case(ifs=[exp.If(this=column("_group").is_(exp.null()), true=number(1.0))], default=number(0.0))
    sums = [exp.Count(this=exp.Star()), exp.Max(this=null_group)]
    sums += [exp.Sum(this=exp.Mul(this=column(names[i]), expression=column(names[j]))) for i, j in upper_pairs(size)]
    return exp.select(*sums).from_(grouped.subquery("_clusters"))
