"""Every cross-validation fold of a model fitted in lockstep, from one grouped pass per IRLS step.

A pass evaluates each fold's coefficients on every fold's rows at once (`statistics_query` grouped by
fold), so it returns, per fold f and per fold's model g, the sums over f's rows. The training sums of
model g are the total over all folds minus fold g's own, and fold g's own sums are its held-out
deviance: k folds cost a few passes over the data, not k fits.

Every fold is fitted with one total weight and one penalty (run_irls takes one of each): fold g's sums
are multiplied by W / W_g (W all training weight, W_g fold g's training weight). The objective IRLS
then sees, W/W_g (deviance_g + 2 W_g penalty), is a constant multiple of fold g's own, with the same
minimum and the same Newton steps. The penalty scales terms by the sd of all training rows (not
each fold's): the strength chosen by cross-validation is then the one the final fit uses.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from sqlglot import exp

from ..compiler.layout import DesignLayout
from ..engines.base import Engine
from ..errors import FeatpipeError
from ..sqlgen.statistics import ModelRequest, statistics_query
from .families import BOUNDARY_ETA, Family
from .irls import AliasedTerms, IrlsResult, run_irls
from .penalty import ScaledPenalty
from .sources import Request, Scaling, Statistics, _unpack


@dataclass(frozen=True)
class FoldRequest(Request):
    """A linear predictor of the model fitted without fold `fold`."""

    fold: int


class FoldSource:
    """Each fold's training statistics from one grouped query per pass; `held_out` keeps, per fold,
    the sums over its own rows at the coefficients last evaluated."""

    name = "folds"

    def __init__(self, engine: Engine, layout: DesignLayout, family: Family, scaling: Scaling,
                 fold: exp.Expression, weights: Mapping[int, float]):
        self.engine, self.layout, self.family, self.fold = engine, layout, family, fold
        self.centers = dict(zip(layout.terms, scaling.centers.tolist(), strict=True))
        self.scales = dict(zip(layout.terms, scaling.scales.tolist(), strict=True))
        total = sum(weights.values())
        self.rescale = {index: total / (total - weight) for index, weight in weights.items()}
        self.held_out: dict[int, Statistics] = {}
        self.passes = 0

    def evaluate(self, requests: Sequence[FoldRequest]) -> list[Statistics]:
        models = [ModelRequest(tuple(self.layout.terms[i] for i in request.terms), tuple(request.beta.tolist()))
                  for request in requests]
        query = statistics_query(self.layout, self.family.name, self.centers, self.scales, models,
                                 eta_limit=self.family.eta_limit, boundary_eta=BOUNDARY_ETA, group=self.fold,
                                 power=self.family.power)
        sizes = [len(request.terms) + 1 for request in requests]
        # Each row: the fold, every model's sums, then every model's Pearson chi2 (not needed here).
        groups = {int(row[0]): _unpack(row[1 : len(row) - len(requests)], sizes) for row in self.engine.fetch(query)}
        self.passes += 1
        training = []
        for index, request in enumerate(requests):
            own = groups[request.fold][index]
            others = [statistics[index] for fold, statistics in groups.items() if fold != request.fold]
            self.held_out[request.fold] = own
            training.append(_scaled(_total(others), self.rescale[request.fold]))
        return training


def _total(parts: Sequence[Statistics]) -> Statistics:
    return Statistics(
        deviance=sum(part.deviance for part in parts),
        boundary_rows=sum(part.boundary_rows for part in parts),
        score=sum((part.score for part in parts), np.zeros_like(parts[0].score)),
        xtwx=sum((part.xtwx for part in parts), np.zeros_like(parts[0].xtwx)),
    )


def _scaled(statistics: Statistics, factor: float) -> Statistics:
    return Statistics(statistics.deviance * factor, statistics.boundary_rows, statistics.score * factor, statistics.xtwx * factor)


@dataclass(frozen=True)
class FoldFits:
    """Per fold (in fold order): the IRLS result on the other folds' rows and the held-out deviance
    (prior-weighted) of its own rows at the final coefficients; and the passes over the data."""

    results: tuple[IrlsResult, ...]
    held_out_deviance: tuple[float, ...]
    passes: int


def fit_folds(source: FoldSource, starts: Sequence[np.ndarray], penalty: ScaledPenalty, total_weight: float,
              max_iter: int = 50, tol: float = 1e-10) -> FoldFits:
    """Fit the model once per fold (fold f left out), from `starts[f]` (standardized coefficients)."""
    terms = tuple(range(len(source.layout.terms)))
    requests = [FoldRequest(terms, np.asarray(beta, dtype=float), fold) for fold, beta in enumerate(starts)]
    try:
        results = run_irls(source, requests, penalty, total_weight, max_iter, tol, allow_aliasing=penalty.active)
    except AliasedTerms as error:
        names = ", ".join(source.layout.terms[alias.column - 1] for alias in error.aliases if alias.column > 0)
        raise FeatpipeError(f"design table {source.layout.table}: on one cross-validation fold the terms {names} are "
                            "linear combinations of others; use fewer folds or drop the aliased terms") from None
    source.evaluate([FoldRequest(terms, result.beta, fold) for fold, result in enumerate(results)])
    return FoldFits(tuple(results), tuple(source.held_out[fold].deviance for fold in range(len(results))), source.passes)
