"""k-fold cross-validation of a spec on its training rows, and `penalty: {l2: cv}`.

The folds are hash-assigned in SQL (featpipe.sqlgen.crossval) and fitted in lockstep from sufficient
statistics split by fold (featpipe.glm.folds): from the rows read out with their fold where a fit reads
them out (streamed on DuckDB, copied once on PostgreSQL), else from an aggregate query grouped by fold.
Each fold's model is then measured on its own rows with the holdout metric function itself, so a fold
reports what a holdout reports; the record keeps every fold's metrics, their mean and their spread
(sample sd over folds).

For `l2: cv` the folds are fitted for each strength of a log grid, strongest first (each run starts
from the previous run's coefficients and the sums read there), and the strength with the smallest
cross-validated deviance (the prior-weighted deviance of each fold's rows under the model fitted
without them, summed) is chosen; ties go to the stronger penalty.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Mapping
from dataclasses import dataclass, replace

import numpy as np

from ..compiler.layout import DesignLayout
from ..engines.base import Engine
from ..errors import FeatpipeError
from ..fitted import as_written
from ..glm.families import get_family
from ..glm.fit import AUTO_SOURCES, BATCH_ROWS
from ..glm.folds import BatchFoldSource, FoldFits, FoldSource, fit_folds
from ..glm.penalty import ScaledPenalty
from ..glm.sources import LocalCopy, Scaling, Statistics, engine_batches
from ..project import ModelSpec, Penalty
from ..project.names import INTERCEPT
from ..sqlgen.crossval import fold_flag, fold_number, fold_sizes_query, fold_table_query
from ..sqlgen.statistics import profile_query, read_profile
from .metrics import holdout_metrics

# 10 down to 1e-4 in half decades (common practice), at the fitted file's precision so the strength
# written is the strength used.
L2_GRID = tuple(as_written(10.0 ** (exponent / 2)) for exponent in range(2, -9, -1))


@dataclass(frozen=True)
class PenaltyChoice:
    """The penalty a fit uses; with `l2: cv` also the record of the search (grid, deviance per strength,
    the choice), the folds it split the rows into and their fits at the chosen strength, which
    `cross_validation` measures."""

    penalty: Penalty
    record: dict | None = None
    folds: _Folds | None = None
    fits: FoldFits | None = None


def chosen_penalty(engine: Engine, layout: DesignLayout, spec: ModelSpec) -> PenaltyChoice:
    """The spec's penalty, with l2 chosen on L2_GRID by cross-validated deviance when the spec says `l2: cv`."""
    if not spec.penalty.cross_validated:
        return PenaltyChoice(spec.penalty)
    path, starts, first = [], None, None
    with _Folds(engine, layout, spec) as folds:
        for l2 in L2_GRID:
            fits = folds.fit(Penalty(l2=l2, l1=spec.penalty.l1), starts, first)
            path.append(fits)
            starts, first = [result.beta for result in fits.results], fits.final
    deviances = [sum(fits.held_out_deviance) for fits in path]
    best = min(range(len(L2_GRID)), key=lambda index: (deviances[index], index))
    return PenaltyChoice(Penalty(l2=L2_GRID[best], l1=spec.penalty.l1),
                         {"grid": list(L2_GRID), "deviance": deviances, "chosen": L2_GRID[best]}, folds, path[best])


def cross_validation(engine: Engine, layout: DesignLayout, spec: ModelSpec, choice: PenaltyChoice,
                     fitted: Mapping[str, float]) -> dict:
    """The fitted file's `crossval` record: per fold its training rows and metrics, their mean and sd.
    With `l2: cv` the folds are those the search fitted at the chosen strength (`passes` counts that
    strength's passes), not fitted again; otherwise each fold starts from the model fitted on every
    training row (`fitted`, its coefficients by name), which a model fitted without one fold lies near."""
    folds, fits = choice.folds, choice.fits
    if fits is None:
        with _Folds(engine, layout, spec) as folds:
            fits = folds.fit(choice.penalty, [folds.standardized(fitted)] * spec.folds)
    per_fold = []
    scratch = f"crossval_{spec.name}"
    engine.create_table(scratch, fold_table_query(layout, folds.fold, spec.folds))
    try:
        for index, result in enumerate(fits.results):
            coefficients = folds.original(result.beta)
            measured = replace(layout, table=scratch, holdout=fold_flag(index))
            metrics = holdout_metrics(engine, measured, spec.family, coefficients, spec.threshold,
                                      spec.weight_kind == "frequency", power=spec.power)
            per_fold.append({"fold": index + 1, "train": folds.training_rows - folds.rows[index], "converged": bool(result.converged),
                             "metrics": metrics})
    finally:
        engine.drop_table(scratch)
    record = {"folds": spec.folds, "salt": spec.holdout.salt, "passes": fits.passes, "per_fold": per_fold,
              "mean": {}, "sd": {}}
    for name, value in per_fold[0]["metrics"].items():
        values = [item["metrics"].get(name) for item in per_fold]
        if name in ("rows", "events") or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values):
            continue
        record["mean"][name] = statistics.fmean(values)
        record["sd"][name] = statistics.stdev(values)
    if choice.record is not None:
        record["l2"] = choice.record
    return record


class _Folds:
    """The folds of one spec's training rows: their sizes, the working scaling and the fold fitter; a
    context manager, as the rows it reads may be a local copy to throw away."""

    def __init__(self, engine: Engine, layout: DesignLayout, spec: ModelSpec):
        self.engine, self.layout, self.family = engine, layout, get_family(spec.family, spec.power)
        self.fold = fold_number(layout.key, spec.holdout.salt, spec.folds)
        sizes = {int(fold): (int(rows), float(weight)) for fold, rows, weight in engine.fetch(fold_sizes_query(layout, self.fold))}
        empty = [fold + 1 for fold in range(spec.folds) if sizes.get(fold, (0, 0.0))[0] == 0]
        if empty:
            raise FeatpipeError(f"{spec.display}: cross-validation fold {empty[0]} of {spec.folds} has no training rows; "
                                "use fewer folds")
        self.rows = [sizes[fold][0] for fold in range(spec.folds)]
        self.weights = {fold: sizes[fold][1] for fold in range(spec.folds)}
        self.training_rows = sum(self.rows)
        self.scaling, self.start = self._scaling_and_start()
        source = AUTO_SOURCES.get(engine.name, "sql")
        batches = None if source == "sql" else engine_batches(engine, layout, BATCH_ROWS, group=self.fold)
        self.batches = LocalCopy(batches) if source == "local" else batches

    def __enter__(self) -> _Folds:
        return self

    def __exit__(self, *exception) -> None:
        if isinstance(self.batches, LocalCopy):
            self.batches.close()

    def _scaling_and_start(self) -> tuple[Scaling, np.ndarray]:
        """Terms centered and scaled by their training mean and population sd (so the penalty needs no
        factors), and the intercept-only start at the training mean of the target."""
        zeros = {term: 0.0 for term in self.layout.terms}
        rough = read_profile(self.engine.fetch(profile_query(self.layout, zeros))[0], self.layout, zeros)
        shifts = {term.name: term.mean if math.isfinite(term.mean) else 0.0 for term in rough.terms}
        profile = read_profile(self.engine.fetch(profile_query(self.layout, shifts))[0], self.layout, shifts)
        rows = profile.rows
        sds = np.array([term.sd * math.sqrt((rows - 1) / rows) for term in profile.terms])
        scaling = Scaling(np.array([term.mean for term in profile.terms]), np.where(sds > 0, sds, 1.0))
        mean = profile.weighted_target_sum / profile.weight_sum
        if self.family.name != "gaussian":
            mean = max(mean, 0.5 / (rows + 1))
        if self.family.link == "logit":
            mean = min(mean, 1 - 0.5 / (rows + 1))
        offset = profile.weighted_offset_sum / profile.weight_sum
        return scaling, np.r_[self.family.link_of_mean(mean) - offset, np.zeros(len(self.layout.terms))]

    def fit(self, penalty: Penalty, starts: list[np.ndarray] | None, first: tuple[Statistics, ...] | None = None):
        if self.batches is None:
            source = FoldSource(self.engine, self.layout, self.family, self.scaling, self.fold, self.weights)
        else:
            source = BatchFoldSource(self.batches, self.layout, self.family, self.scaling, self.weights)
        scaled = ScaledPenalty(penalty.l2, penalty.l1)
        return fit_folds(source, starts or [self.start] * len(self.rows), scaled, sum(self.weights.values()), first=first)

    def standardized(self, coefficients: Mapping[str, float]) -> np.ndarray:
        """The model's own coefficients ({INTERCEPT: ..., term: ...}) as standardized ones: `original` undone."""
        values = np.array([coefficients[name] for name in (INTERCEPT, *self.layout.terms)])
        return np.linalg.solve(self.scaling.to_original(), values)

    def original(self, beta: np.ndarray) -> dict[str, float]:
        """Standardized coefficients as the model's own: {INTERCEPT: ..., term: ...}."""
        values = self.scaling.to_original() @ beta
        return dict(zip((INTERCEPT, *self.layout.terms), (float(value) for value in values), strict=True))
