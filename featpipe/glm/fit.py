"""Fit a GLM on a design table where the data is (`fit_glm`), or on in-memory arrays (`fit_glm_arrays`).

Both run the same steps: a training profile (counts, domain checks, term means and sds), IRLS over a
statistics source for the model and its intercept-only null model together, then inference on the
original scale of the terms. Terms are standardized inside (training mean, population sd), which
keeps X'WX well conditioned and gives the penalty its scale (see `penalty`).

On an engine the data is read a few times only: a deterministic sample (the first `sample_rows`
training rows; by key order on engines without a stable scan order) is fitted in memory first, so the
passes over the whole table start next to the answer (two or three IRLS passes instead of five to
eight from the intercept-only start).

Precision: IRLS stops when the next step would change the deviance by less than `tol` (relative) and
still takes that step, so at tol=1e-10 estimates agree with a fully converged fit to about 1e-9. The
standard errors come from X'WX at the last evaluated coefficients, one small step before the final
ones: about 1e-7 relative on small tables, somewhat more on very large ones (no extra pass is spent
on them).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
from scipy.special import gammaln

from ..engines.base import Engine
from ..errors import FeatpipeError
from ..project import Penalty
from ..sqlgen.layout import DesignLayout
from ..sqlgen.statistics import (
    TermProfile,
    TrainingProfile,
    design_columns_query,
    profile_query,
    read_profile,
    target_counts_query,
)
from . import problems
from .families import Family, get_family
from .inference import information_criteria, log_likelihood, wald
from .irls import AliasedTerms, IrlsResult, run_irls
from .linalg import inverse_spd, variance_inflation
from .penalty import ScaledPenalty
from .sources import (
    Batch,
    BatchSource,
    Request,
    Scaling,
    SqlAggregateSource,
    StatisticsSource,
    batch_from_arrow,
    engine_batches,
    in_memory_batches,
)

INTERCEPT = "(intercept)"
SAMPLE_ROWS = 100_000  # rows of the in-memory warm-start sample
BATCH_ROWS = 131_072  # rows per streamed batch: about 1 MB per term column


@dataclass(frozen=True)
class GlmFit:
    """A fitted GLM. Sequences follow `names`: the intercept first, then the terms.

    Inference fields are None for a penalized fit (`penalized`), where plain Wald inference does not
    hold; `vif` is None for the intercept.
    """

    family: str
    link: str
    names: tuple[str, ...]
    coef: tuple[float, ...]
    stderr: tuple[float, ...] | None
    statistic: tuple[float, ...] | None  # z, or t for gaussian (`statistic_name`)
    p_value: tuple[float, ...] | None
    ci_low: tuple[float, ...] | None  # 95% Wald interval
    ci_high: tuple[float, ...] | None
    covariance: tuple[tuple[float, ...], ...] | None
    vif: tuple[float | None, ...]
    deviance: float
    null_deviance: float  # intercept-only model with the same offset and weights
    llf: float
    aic: float  # -2 llf + 2 k, k = coefficients (nonzero ones under an l1 penalty)
    bic: float  # -2 llf + k ln n
    n_train: int
    weight_sum: float
    df_residual: int
    dispersion: float  # Pearson chi2 / (n - p) for gaussian, 1 otherwise
    iterations: int  # IRLS passes over the full training rows for the model
    converged: bool
    passes_over_data: int  # every full read of the training rows, profile included
    source: str  # "sql", "stream" or "arrays"
    penalized: bool
    statistic_name: str
    warnings: tuple[str, ...]
    term_profiles: tuple[TermProfile, ...]


def fit_glm(
    engine: Engine,
    layout: DesignLayout,
    family: str,
    penalty: Penalty = Penalty(),
    *,
    max_iter: int = 50,
    tol: float = 1e-10,
    source: str = "auto",
    sample_rows: int = SAMPLE_ROWS,
    batch_rows: int = BATCH_ROWS,
) -> GlmFit:
    """Fit on the training rows of a design table in `engine`.

    `source`: "sql" (one aggregate query per pass, any engine), "stream" (batches through numpy,
    memory one batch) or "auto" (stream on DuckDB, sql elsewhere).
    """
    if source not in ("auto", "sql", "stream"):
        raise ValueError(f"unknown statistics source {source!r}")
    glm_family = get_family(family)
    streamed = source == "stream" or (source == "auto" and engine.name == "duckdb")
    ordered = not streamed
    frame = engine.fetch_frame(design_columns_query(layout, limit=sample_rows, ordered=ordered))
    sample = batch_from_arrow(pa.RecordBatch.from_pandas(frame, preserve_index=False), layout)
    passes = 1 if ordered else 0  # ORDER BY key reads every row once
    shifts = {term: float(np.mean(values)) if len(values) else 0.0 for term, values in zip(layout.terms, sample.terms)}
    profile = read_profile(engine.fetch(profile_query(layout, shifts))[0], layout, shifts)
    passes += 1
    where = f"design table {layout.table}"
    warnings = problems.check_training_rows(profile, glm_family, where, layout.target, layout.weight)
    constant = 0.0
    if glm_family.name == "poisson":
        counts = engine.fetch(target_counts_query(layout))
        passes += 1
        constant = poisson_constant(np.array([float(v) for v, _ in counts]), np.array([float(w) for _, w in counts]))
    scaling = _scaling(profile)
    if streamed:
        statistics: StatisticsSource = BatchSource("stream", engine_batches(engine, layout, batch_rows), glm_family, scaling)
    else:
        statistics = SqlAggregateSource(engine, layout, glm_family, scaling)
    warm = None
    if profile.rows > len(sample.y):  # a strict subset: worth fitting first
        sample_weight = float(len(sample.y) if sample.weight is None else sample.weight.sum())
        warm = (BatchSource("sample", in_memory_batches(sample, batch_rows), glm_family, scaling), sample_weight)
    return _fit(
        statistics, glm_family, layout.terms, where, profile, constant, scaling, penalty, warm, max_iter, tol, passes, warnings,
        has_offset=layout.offset is not None,
    )


def fit_glm_arrays(
    X,
    y,
    family: str,
    offset=None,
    weights=None,
    penalty: Penalty = Penalty(),
    *,
    names: tuple[str, ...] | None = None,
    max_iter: int = 50,
    tol: float = 1e-10,
    batch_rows: int = BATCH_ROWS,
) -> GlmFit:
    """The same fit on in-memory arrays: X (rows x terms, no intercept column), y, optional offset and weights."""
    glm_family = get_family(family)
    terms = np.asarray(X, dtype=float)
    terms = terms.reshape(len(terms), -1)
    target = np.asarray(y, dtype=float)
    offset = None if offset is None else np.asarray(offset, dtype=float)
    weights = None if weights is None else np.asarray(weights, dtype=float)
    names = tuple(names) if names is not None else tuple(f"x{j + 1}" for j in range(terms.shape[1]))
    profile = profile_from_arrays(terms, target, offset, weights, names)
    warnings = problems.check_training_rows(profile, glm_family, "the arrays", "y", "weights" if weights is not None else None)
    constant = poisson_constant(target, np.ones_like(target) if weights is None else weights)
    scaling = _scaling(profile)
    data = Batch(target, offset, weights, [terms[:, j] for j in range(terms.shape[1])])
    statistics = BatchSource("arrays", in_memory_batches(data, batch_rows), glm_family, scaling)
    return _fit(
        statistics, glm_family, names, "the arrays", profile, constant, scaling, penalty, None, max_iter, tol, 1, warnings,
        has_offset=offset is not None,
    )


def profile_from_arrays(terms: np.ndarray, y: np.ndarray, offset, weights, names) -> TrainingProfile:
    """The `TrainingProfile` of in-memory arrays, as `profile_query` computes it in SQL."""
    rows = len(y)
    w = np.ones(rows) if weights is None else weights
    term_profiles = tuple(
        TermProfile(name, rows, float(values.mean()), float(values.std(ddof=1)) if rows > 1 else 0.0, float(values.min()), float(values.max()))
        if rows
        else TermProfile(name, 0, math.nan, math.nan, math.nan, math.nan)
        for name, values in zip(names, terms.T, strict=True)
    )
    return TrainingProfile(
        rows=rows,
        weight_sum=float(w.sum()),
        weighted_target_sum=float(w @ y),
        target_sum=float(y.sum()),
        target_min=float(y.min()) if rows else None,
        target_max=float(y.max()) if rows else None,
        weighted_offset_sum=0.0 if offset is None else float(w @ offset),
        log_weight_sum=0.0 if weights is None else float(np.log(weights[weights > 0]).sum()),
        not_binary=int(((y != 0) & (y != 1)).sum()),
        negative=int((y < 0).sum()),
        not_integer=int((y != np.floor(y)).sum()),
        nonpositive_weights=0 if weights is None else int((weights <= 0).sum()),
        terms=term_profiles,
    )


def poisson_constant(values: np.ndarray, weights: np.ndarray) -> float:
    """sum w (y ln y - y - ln y!), the part of the poisson log-likelihood the deviance leaves out."""
    positive = np.where(values > 0, values, 1.0)
    per_row = np.where(values > 0, values * np.log(positive), 0.0) - values - gammaln(values + 1.0)
    order = np.argsort(values, kind="stable")  # a fixed summation order: same data, same digits
    return float((weights[order] * per_row[order]).sum())


def _scaling(profile: TrainingProfile) -> Scaling:
    rows = profile.rows
    centers = np.array([term.mean for term in profile.terms])
    scales = np.array([term.sd * math.sqrt((rows - 1) / rows) for term in profile.terms])
    return Scaling(centers, scales)


def _starts(family: Family, profile: TrainingProfile, size: int) -> list[Request]:
    """Model and null model at the intercept of the mean target (exact for the null without offset)."""
    total = profile.weight_sum
    intercept = family.link_of_mean(profile.weighted_target_sum / total) - profile.weighted_offset_sum / total
    return [Request(tuple(range(size)), np.r_[intercept, np.zeros(size)]), Request((), np.array([intercept]))]


def _warm_starts(
    sample: StatisticsSource, total_weight: float, starts: list[Request], penalty: ScaledPenalty, max_iter: int, tol: float, refine_null: bool
) -> list[Request]:
    """Starts fitted on the sample; the plain starts when the sample cannot be fitted cleanly (aliased on
    its rows, not converging, running away). Without an offset the null model's plain start is already
    exact, so only the model's is replaced."""
    try:
        model, null = run_irls(sample, starts, penalty, total_weight, max_iter, tol, allow_aliasing=penalty.active)
    except (AliasedTerms, FeatpipeError):
        return starts
    if not (model.converged and null.converged) or problems.runaway_terms(model.step):
        return starts
    return [Request(model.terms, model.beta), Request(null.terms, null.beta) if refine_null else starts[1]]


def _fit(
    source: StatisticsSource,
    family: Family,
    names: tuple[str, ...],
    where: str,
    profile: TrainingProfile,
    constant: float,
    scaling: Scaling,
    penalty: Penalty,
    warm: tuple[StatisticsSource, float] | None,  # the sample source and its total weight
    max_iter: int,
    tol: float,
    passes: int,
    warnings: list[str],
    has_offset: bool,
) -> GlmFit:
    scaled = ScaledPenalty(penalty.l2, penalty.l1)
    starts = _starts(family, profile, len(names))
    if warm is not None:
        starts = _warm_starts(*warm, starts, scaled, max_iter, tol, refine_null=has_offset)
    try:
        model, null = run_irls(source, starts, scaled, profile.weight_sum, max_iter, tol, allow_aliasing=scaled.active)
    except AliasedTerms as error:
        raise FeatpipeError(problems.aliased_message(error.aliases, names, scaling, where)) from None
    return _result(model, null, source, family, names, where, profile, constant, scaling, scaled, max_iter, passes, warnings)


def _result(
    model: IrlsResult,
    null: IrlsResult,
    source: StatisticsSource,
    family: Family,
    names: tuple[str, ...],
    where: str,
    profile: TrainingProfile,
    constant: float,
    scaling: Scaling,
    penalty: ScaledPenalty,
    max_iter: int,
    passes: int,
    warnings: list[str],
) -> GlmFit:
    statistics = model.statistics
    transform = scaling.to_original()
    coef = transform @ model.beta
    size = len(coef)
    df_residual = profile.rows - size
    dispersion = statistics.deviance / df_residual if family.estimates_dispersion else 1.0
    inverse = inverse_spd(statistics.xtwx)
    inference = None
    if not penalty.active:
        covariance = transform @ (dispersion * inverse) @ transform.T
        inference = wald(coef, covariance, family, df_residual)
    warnings = list(warnings)
    if model.aliases:
        warnings.append(problems.aliased_message(model.aliases, names, scaling, where))
    # A step that is still large is a runaway once the deviance has settled (or fitted values sit at
    # the boundary); before that it is only an unfinished fit.
    settled = model.converged or statistics.boundary_rows > 0
    runaway = problems.runaway_terms(model.step) if family.name != "gaussian" and settled else []
    if runaway or statistics.boundary_rows:
        message = problems.separation(
            family, statistics.boundary_rows, names, runaway, model.beta, None if inference is None else inference.statistic
        )
        if runaway and not penalty.active:
            raise FeatpipeError(f"{where}: {message}")
        warnings.append(message)
    if not model.converged:
        warnings.append(problems.not_converged(max_iter, model.change))
    if not null.converged:
        warnings.append("the intercept-only model did not converge: the null deviance is approximate")
    if penalty.active:
        warnings.append(problems.penalized_inference(penalty.l2, penalty.l1))
    parameters = size if penalty.l1 == 0 else 1 + int(np.count_nonzero(model.beta[1:]))
    llf = log_likelihood(family, statistics.deviance, profile.rows, profile.log_weight_sum, constant)
    aic, bic = information_criteria(llf, parameters, profile.rows)

    def plain(values) -> tuple[float, ...] | None:
        return None if inference is None else tuple(float(v) for v in values)

    return GlmFit(
        family=family.name,
        link=family.link,
        names=(INTERCEPT, *names),
        coef=tuple(float(v) for v in coef),
        stderr=plain(inference.stderr) if inference else None,
        statistic=plain(inference.statistic) if inference else None,
        p_value=plain(inference.p_value) if inference else None,
        ci_low=plain(inference.ci_low) if inference else None,
        ci_high=plain(inference.ci_high) if inference else None,
        covariance=None if inference is None else tuple(tuple(float(v) for v in row) for row in covariance),
        vif=(None, *(float(v) for v in variance_inflation(statistics.xtwx, inverse))),
        deviance=float(statistics.deviance),
        null_deviance=float(null.statistics.deviance),
        llf=float(llf),
        aic=float(aic),
        bic=float(bic),
        n_train=profile.rows,
        weight_sum=profile.weight_sum,
        df_residual=df_residual,
        dispersion=float(dispersion),
        iterations=model.iterations,
        converged=model.converged,
        passes_over_data=passes + source.passes,
        source=source.name,
        penalized=penalty.active,
        statistic_name=family.statistic_name,
        warnings=tuple(warnings),
        term_profiles=profile.terms,
    )
