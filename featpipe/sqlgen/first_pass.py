"""The first IRLS pass of an aggregate fit with the training profile in the same scan.

A fit must know the training profile (row count, domain checks, term moments) before it uses its
first step's statistics, but not before it computes them: both are sums over the same training rows,
so one query returns both, and an engine without a streamed source reads the rows once less. The row
holds the profile's columns first (`read_profile`), then the statistics' (`statistics_query`):

    >>> from featpipe.compiler.layout import DesignLayout
    >>> from featpipe.sqlgen.common import render
    >>> layout = DesignLayout("design_m", "id", "_target", ("a",))
    >>> query = first_pass_query(layout, {"a": 0.0}, "gaussian", {"a": 0.0}, {"a": 1.0},
    ...                          [ModelRequest((), (0.0,))], eta_limit=None, boundary_eta=30.0)
    >>> rendered = render(query, "duckdb", pretty=False)
    >>> rendered.count('FROM "design_m"'), len(query.expressions) == PROFILE_HEAD + 4 + 2 + 1 + 1 + 1
    (1, True)
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from sqlglot import exp

from ..compiler.layout import DesignLayout
from .statistics import PROFILE_HEAD, ModelRequest, profile_query, statistics_query


def profile_width(layout: DesignLayout) -> int:
    """Columns of the profile at the head of `first_pass_query`'s row."""
    return PROFILE_HEAD + 4 * len(layout.terms)


def first_pass_query(
    layout: DesignLayout,
    shifts: Mapping[str, float],
    family: str,
    centers: Mapping[str, float],
    scales: Mapping[str, float],
    models: Sequence[ModelRequest],
    *,
    eta_limit: float | None,
    boundary_eta: float,
    power: float | None = None,
) -> exp.Select:
    """`profile_query`'s sums and `statistics_query`'s in one SELECT over one scan of the training rows.

    The profile's expressions read the design columns by name; `statistics_query` carries those columns
    through its levels, so the same expressions sum the same rows beside the statistics."""
    statistics = statistics_query(layout, family, centers, scales, models, eta_limit=eta_limit,
                                  boundary_eta=boundary_eta, power=power, carry=layout.model_columns)
    combined = statistics.copy()
    combined.set("expressions", [*profile_query(layout, shifts).expressions, *statistics.expressions])
    return combined
