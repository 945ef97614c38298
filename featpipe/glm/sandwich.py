"""Sandwich (robust) standard errors: bread (X'WX)^-1, middle term from the engine, bread again.

`errors: robust` is HC1: the heteroskedasticity-consistent middle term sum of u_i u_i' (u_i a row's
score contribution) scaled by n / (n - p). It is chosen over HC0 because it is the cluster form with
every row its own cluster: the cluster correction G / (G - 1) * (n - 1) / (n - p) is n / (n - p) when
G = n, so the two kinds of robust errors agree where they should, and it is less optimistic in small
samples. `errors: {cluster: c}` sums the scores per value of c first (rows within a cluster may be
correlated, clusters independent) and applies that cluster correction (statsmodels' `cov_type='cluster'`
default, as Stata and R's sandwich::vcovCL with type HC1 do). The dispersion cancels: it divides both the
scores and the information. The Wald tests then use the normal distribution, as the sandwich is a
large-sample result (statsmodels' GLM default).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..compiler.layout import DesignLayout
from ..engines.base import Engine
from ..errors import FeatpipeError
from ..sqlgen.sandwich import sandwich_query
from ..sqlgen.statistics import ModelRequest, upper_pairs
from .families import BOUNDARY_ETA, Family
from .result import RobustErrors
from .sources import Scaling

KINDS = ("model", "robust", "cluster")


@dataclass(frozen=True)
class Middle:
    """The middle term on the working scale and the clusters it was summed over."""

    matrix: np.ndarray
    clusters: int


def engine_middle(engine: Engine, layout: DesignLayout, family: Family, scaling: Scaling, by_cluster: bool,
                  terms: tuple[int, ...], beta: np.ndarray) -> Middle:
    """One grouped pass over the training rows (by the cluster column with `by_cluster`, else by the key)
    for the middle term at the working coefficients `beta`."""
    model = ModelRequest(tuple(layout.terms[i] for i in terms), tuple(beta.tolist()))
    query = sandwich_query(
        layout, family.name,
        dict(zip(layout.terms, scaling.centers.tolist(), strict=True)),
        dict(zip(layout.terms, scaling.scales.tolist(), strict=True)),
        model, eta_limit=family.eta_limit, boundary_eta=BOUNDARY_ETA, power=family.power, by_cluster=by_cluster,
    )
    (row,) = engine.fetch(query)
    clusters, null_cluster = int(row[0]), row[1]
    if null_cluster is not None and float(null_cluster) > 0:
        raise FeatpipeError(f"design table {layout.table}: the cluster column is NULL in some training rows; "
                            "fill it (every row needs a cluster for errors: {cluster: c}) or drop those rows in the input")
    size = len(terms) + 1
    matrix = np.empty((size, size))
    for value, (i, j) in zip(row[2:], upper_pairs(size), strict=True):
        matrix[i, j] = matrix[j, i] = float(value)
    return Middle(matrix, clusters)


def sandwich(inverse_information: np.ndarray, middle: Middle, kind: str, rows: float) -> tuple[np.ndarray, RobustErrors]:
    """The corrected sandwich covariance on the working scale and its record; `rows` is n (the weight sum
    for frequency weights)."""
    parameters = len(inverse_information)
    if rows <= parameters or (kind == "cluster" and middle.clusters < 2):
        raise FeatpipeError(f"robust standard errors need more {'clusters' if kind == 'cluster' else 'rows'} than that: "
                            f"{middle.clusters} clusters and {rows:g} rows for {parameters} coefficients")
    if kind == "cluster":
        correction = middle.clusters / (middle.clusters - 1) * (rows - 1) / (rows - parameters)
    else:
        correction = rows / (rows - parameters)
    covariance = correction * inverse_information @ middle.matrix @ inverse_information
    return covariance, RobustErrors("cluster" if kind == "cluster" else "HC1", middle.clusters, float(correction))
