"""Every cross-validation fold of a model fitted in lockstep, from one pass over the rows per IRLS step.

A pass evaluates each fold's coefficients on every row at once and splits the sums by the row's fold,
so it returns, per fold g's model, the sums over g's own rows (its held-out deviance) and over the
other folds' rows (its training sums): k folds cost a few passes over the data, not k fits. Two
sources do this: `FoldSource`, one aggregate query grouped by fold (any engine), and `BatchFoldSource`,
the rows streamed through numpy with their fold, as `BatchSource` reads them for a fit.

Every fold is fitted with one total weight and one penalty (run_irls takes one of each): fold g's sums
are multiplied by W / W_g (W all training weight, W_g fold g's training weight). The objective IRLS
then sees, W/W_g (deviance_g + 2 W_g penalty), is a constant multiple of fold g's own, with the same
minimum and the same Newton steps. The penalty scales terms by the sd of all training rows (not
each fold's): the strength chosen by cross-validation is then the one the final fit uses.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
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
from .sources import (
    BLOCK_ROWS,
    Batch,
    BatchSource,
    Request,
    Scaling,
    Statistics,
    Totals,
    cut_rows,
    one_blas_thread,
    row_blocks,
    term_columns,
    unpack_statistics,
    weighted_sum,
)


@dataclass(frozen=True)
class FoldRequest(Request):
    """A linear predictor of the model fitted without fold `fold`."""

    fold: int


class _FoldBook:
    """Per fold: the factor its training sums are multiplied by, and at the coefficients last evaluated
    its own sums (`held_out`) and its training statistics (`evaluated`, with those coefficients)."""

    def __init__(self, weights: Mapping[int, float]):
        total = sum(weights.values())
        self.rescale = {index: total / (total - weight) for index, weight in weights.items()}
        self.held_out: dict[int, Statistics] = {}
        self.evaluated: dict[int, tuple[np.ndarray, Statistics]] = {}

    def training(self, requests: Sequence[FoldRequest], sums: Sequence[tuple[Statistics, Statistics]]) -> list[Statistics]:
        """Each request's training statistics from (its fold's own sums, the other folds' sums)."""
        training = []
        for request, (own, others) in zip(requests, sums, strict=True):
            self.held_out[request.fold] = own
            training.append(_scaled(others, self.rescale[request.fold]))
            self.evaluated[request.fold] = (request.beta.copy(), training[-1])
        return training


class FoldSource:
    """Each fold's training statistics from one grouped query per pass; `book` keeps, per fold, the
    sums over its own rows at the coefficients last evaluated."""

    name = "folds"

    def __init__(self, engine: Engine, layout: DesignLayout, family: Family, scaling: Scaling,
                 fold: exp.Expression, weights: Mapping[int, float]):
        self.engine, self.layout, self.family, self.fold = engine, layout, family, fold
        self.centers = dict(zip(layout.terms, scaling.centers.tolist(), strict=True))
        self.scales = dict(zip(layout.terms, scaling.scales.tolist(), strict=True))
        self.book = _FoldBook(weights)
        self.passes = 0

    def evaluate(self, requests: Sequence[FoldRequest]) -> list[Statistics]:
        models = [ModelRequest(tuple(self.layout.terms[i] for i in request.terms), tuple(request.beta.tolist()))
                  for request in requests]
        query = statistics_query(self.layout, self.family.name, self.centers, self.scales, models,
                                 eta_limit=self.family.eta_limit, boundary_eta=BOUNDARY_ETA, group=self.fold,
                                 power=self.family.power)
        sizes = [len(request.terms) + 1 for request in requests]
        # Each row: the fold, every model's sums, then every model's Pearson chi2 (not needed here).
        groups = {int(row[0]): unpack_statistics(row[1 : len(row) - len(requests)], sizes) for row in self.engine.fetch(query)}
        self.passes += 1
        return self.book.training(requests, [
            (groups[request.fold][index], _total([statistics[index] for fold, statistics in groups.items() if fold != request.fold]))
            for index, request in enumerate(requests)
        ])


class BatchFoldSource(BatchSource):
    """`FoldSource` from batches that carry each row's fold (`Batch.group`, numbered 0 to k - 1): each
    block's rows are put in fold order once, then every fold's model is evaluated on the slice of its
    own rows and on the slices around it. Memory is one batch, as for `BatchSource`."""

    def __init__(self, batches: Callable[[], Iterable[Batch]], layout: DesignLayout, family: Family, scaling: Scaling,
                 weights: Mapping[int, float]):
        super().__init__("folds", batches, family, scaling)
        self.layout = layout
        self.book = _FoldBook(weights)
        self._saturated_by_fold: np.ndarray | None = None  # per fold, the sum of w times the saturated deviance

    def evaluate(self, requests: Sequence[FoldRequest]) -> list[Statistics]:
        folds = len(self.book.rescale)
        own = [Totals(len(request.terms) + 1) for request in requests]
        others = [Totals(len(request.terms) + 1) for request in requests]
        saturated = np.zeros(folds) if self._saturated_by_fold is None else None  # summed in the first pass only
        with one_blas_thread():
            for batch in self.batches():
                for block in row_blocks(batch, BLOCK_ROWS):
                    block, bounds = _in_fold_order(block, folds)
                    standardized = self._standardize(block.terms, len(block.y))
                    if saturated is not None:
                        for fold in range(folds):
                            rows = slice(bounds[fold], bounds[fold + 1])
                            saturated[fold] += weighted_sum(self.family.saturated_deviance(block.y[rows]), cut_rows(block.weight, rows))
                    for request, its_own, the_others in zip(requests, own, others, strict=True):
                        start, end = bounds[request.fold], bounds[request.fold + 1]
                        for total, rows in ((the_others, slice(0, start)), (its_own, slice(start, end)), (the_others, slice(end, None))):
                            self._add(total, request, block, standardized, rows)
        self.passes += 1
        if saturated is not None:
            self._saturated_by_fold = saturated
        by_fold, everything = self._saturated_by_fold, float(self._saturated_by_fold.sum())
        return self.book.training(requests, [
            (its_own.statistics(by_fold[request.fold]), the_others.statistics(everything - by_fold[request.fold]))
            for request, its_own, the_others in zip(requests, own, others, strict=True)
        ])

    def _add(self, total: Totals, request: FoldRequest, block: Batch, standardized: np.ndarray, rows: slice) -> None:
        part = Batch(block.y[rows], cut_rows(block.offset, rows), cut_rows(block.weight, rows), [])
        if len(part.y) == 0:
            return
        x = term_columns(standardized[rows], request.terms)
        scratch = None if x is None else self._buffer("rooted", len(x), 1 + x.shape[1])
        total.add(self.family, part, x, request.beta, scratch)


def _in_fold_order(block: Batch, folds: int) -> tuple[Batch, np.ndarray]:
    """The block's rows sorted by fold (stable), and where each fold's rows start (fold k: the end)."""
    order = np.argsort(block.group, kind="stable")
    group = block.group[order]
    ordered = Batch(block.y[order], cut_rows(block.offset, order), cut_rows(block.weight, order),
                    [values[order] for values in block.terms], group)
    return ordered, np.searchsorted(group, np.arange(folds + 1), side="left")


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
    """Per fold (in fold order): the IRLS result on the other folds' rows, the held-out deviance
    (prior-weighted) of its own rows and the training statistics, both at the final coefficients; and
    the passes over the data."""

    results: tuple[IrlsResult, ...]
    held_out_deviance: tuple[float, ...]
    final: tuple[Statistics, ...]
    passes: int


def fit_folds(source: FoldSource | BatchFoldSource, starts: Sequence[np.ndarray], penalty: ScaledPenalty, total_weight: float,
              max_iter: int = 50, tol: float = 1e-10, first: Sequence[Statistics] | None = None) -> FoldFits:
    """Fit the model once per fold (fold f left out), from `starts[f]` (standardized coefficients).

    `first`: the training statistics at the starts when a pass already read them, as the `final` of a
    fit that ended there: a penalty path started from the last strength's coefficients reads no pass
    again for its first step (the sums do not depend on the penalty).
    """
    terms = tuple(range(len(source.layout.terms)))
    requests = [FoldRequest(terms, np.asarray(beta, dtype=float), fold) for fold, beta in enumerate(starts)]
    try:
        results = run_irls(source, requests, penalty, total_weight, max_iter, tol, allow_aliasing=penalty.active,
                           first=None if first is None else list(first))
    except AliasedTerms as error:
        names = ", ".join(source.layout.terms[alias.column - 1] for alias in error.aliases if alias.column > 0)
        raise FeatpipeError(f"design table {source.layout.table}: on one cross-validation fold the terms {names} are "
                            "linear combinations of others; use fewer folds or drop the aliased terms") from None
    # A fit that converged evaluated its final coefficients in its last pass unless its last step was
    # already negligible (see irls.SETTLED): one more pass, for those folds alone, when any did not.
    unevaluated = [FoldRequest(terms, result.beta, fold) for fold, result in enumerate(results)
                   if fold not in source.book.evaluated or not np.array_equal(source.book.evaluated[fold][0], result.beta)]
    if unevaluated:
        source.evaluate(unevaluated)
    final = tuple(source.book.evaluated[fold][1] for fold in range(len(results)))
    return FoldFits(tuple(results), tuple(source.book.held_out[fold].deviance for fold in range(len(results))), final, source.passes)
