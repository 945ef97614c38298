"""Fit a GLM on a design table where the data is (`fit_glm`), or on in-memory arrays (`fit_glm_arrays`).

Both run the same steps: a training profile (counts, domain checks, term means and sds), IRLS over a
statistics source for the model and its intercept-only null model together, then inference on the
original scale of the terms. The SQL source reads the profile with one aggregate query first; a batch
source (streamed or in memory) gathers it during its first IRLS pass and the checks run before that
pass's statistics are used.

IRLS works on standardized terms, centered and scaled by the mean and population sd of the sample
(close to the training ones), which keeps X'WX well conditioned; the penalty is defined on terms
standardized by the training mean and population sd (see `penalty`), and results are reported on
the terms' own scale.

On an engine the data is read a few times only: a deterministic sample (the first `sample_rows`
training rows; by key order on engines without a stable scan order) is fitted in memory first, so the
passes over the whole table start next to the answer (two or three IRLS passes instead of five to
eight from the intercept-only start).

Precision: IRLS stops when the next step would change the deviance by less than `tol` (relative) and
still takes that step, so at tol=1e-10 estimates agree with a fully converged fit to about 1e-9 or
better; X'WX, the deviance and the standard errors are those of the final coefficients (see `irls`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from ..compiler.layout import DesignLayout
from ..engines.base import Engine
from ..errors import FeatpipeError
from ..project import Penalty
from ..project.names import INTERCEPT
from ..sqlgen.statistics import (
    TermProfile,
    TrainingProfile,
    design_columns_query,
    profile_query,
    read_profile,
    target_counts_query,
)
from . import problems
from .families import Family, Poisson, get_family
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
    memory one batch) or "auto" (stream on DuckDB, sql elsewhere). `sample_rows`: the first training
    rows read up front; they set the working scaling and, when the table has more rows, the warm
    start. A table sorted by a term gives a poorer warm start (more passes), not a different answer.
    """
    if source not in ("auto", "sql", "stream"):
        raise ValueError(f"unknown statistics source {source!r}")
    if sample_rows < 100:
        raise ValueError("sample_rows must be at least 100: the sample also sets the working scaling")
    glm_family = get_family(family)
    streamed = source == "stream" or (source == "auto" and engine.name == "duckdb")
    ordered = engine.name != "duckdb"  # DuckDB keeps insertion order: its first rows are already fixed
    frame = engine.fetch_frame(design_columns_query(layout, limit=sample_rows, ordered=ordered))
    sample = batch_from_arrow(pa.RecordBatch.from_pandas(frame, preserve_index=False), layout)
    passes = 1 if ordered else 0  # ORDER BY key reads every row once
    scaling = Scaling.of(sample.terms)
    data = _Data(layout.terms, f"design table {layout.table}", layout.target, layout.weight, layout.offset is not None)
    if streamed:
        statistics: StatisticsSource = BatchSource("stream", engine_batches(engine, layout, batch_rows), glm_family, scaling)
        known = None  # the first streamed pass gathers the profile
    else:
        statistics = SqlAggregateSource(engine, layout, glm_family, scaling)
        known, read = _profile_in_sql(engine, layout, glm_family, scaling)
        passes += read
    # A sample that filled its LIMIT is (most likely) a strict subset, worth fitting first.
    warm = BatchSource("sample", in_memory_batches(sample, batch_rows), glm_family, scaling) if len(sample.y) >= sample_rows else None
    return _fit(statistics, glm_family, data, sample, scaling, penalty, warm, known, max_iter, tol, passes)


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
    names = tuple(names) if names is not None else tuple(f"x{j + 1}" for j in range(terms.shape[1]))
    data = Batch(
        np.asarray(y, dtype=float),
        None if offset is None else np.asarray(offset, dtype=float),
        None if weights is None else np.asarray(weights, dtype=float),
        [terms[:, j] for j in range(terms.shape[1])],
    )
    scaling = Scaling.of(data.terms)
    statistics = BatchSource("arrays", in_memory_batches(data, batch_rows), glm_family, scaling)
    about = _Data(names, "the arrays", "y", None if weights is None else "weights", offset is not None)
    return _fit(statistics, glm_family, about, data, scaling, penalty, None, None, max_iter, tol, 0)


@dataclass(frozen=True)
class _Data:
    """What messages and starts need to know about the data being fitted."""

    names: tuple[str, ...]
    where: str  # how messages name the data
    target: str
    weight: str | None
    has_offset: bool


def _profile_in_sql(engine: Engine, layout: DesignLayout, family: Family, scaling: Scaling) -> tuple[tuple[TrainingProfile, float], int]:
    """The training profile and poisson log-likelihood constant from aggregate queries; and how many
    full reads that took."""
    shifts = dict(zip(layout.terms, scaling.centers.tolist(), strict=True))
    profile = read_profile(engine.fetch(profile_query(layout, shifts))[0], layout, shifts)
    if family.name != "poisson":
        return (profile, 0.0), 1
    counts = sorted((float(value), float(weight)) for value, weight in engine.fetch(target_counts_query(layout)))
    values = np.array([value for value, _ in counts])
    weights = np.array([weight for _, weight in counts])
    return (profile, float(weights @ Poisson.likelihood_constant(values))), 2


def _starts(family: Family, sample: Batch, size: int) -> list[Request]:
    """Model and null model at the intercept of the sample's mean target (kept inside the family's range)."""
    rows = len(sample.y)
    weight = np.ones(rows) if sample.weight is None else sample.weight
    total = float(weight.sum()) if rows else 1.0
    mean = float(weight @ sample.y) / total if rows else 0.5
    if family.name == "binomial":
        mean = min(max(mean, 0.5 / (rows + 1)), 1 - 0.5 / (rows + 1))
    elif family.name == "poisson":
        mean = max(mean, 0.5 / (rows + 1))
    offset = float(weight @ sample.offset) / total if rows and sample.offset is not None else 0.0
    intercept = family.link_of_mean(mean) - offset
    return [Request(tuple(range(size)), np.r_[intercept, np.zeros(size)]), Request((), np.array([intercept]))]


def _warm_starts(sample: BatchSource, data: Batch, starts: list[Request], penalty: ScaledPenalty, max_iter: int, tol: float) -> list[Request]:
    """Starts fitted on the sample; the plain starts when the sample cannot be fitted cleanly (aliased on
    its rows, not converging, running away)."""
    total_weight = float(len(data.y) if data.weight is None else data.weight.sum())
    try:
        model, null = run_irls(sample, starts, penalty, total_weight, max_iter, tol, allow_aliasing=penalty.active)
    except (AliasedTerms, FeatpipeError):
        return starts
    if not (model.converged and null.converged) or problems.runaway_terms(model.step):
        return starts
    return [Request(model.terms, model.beta), Request(null.terms, null.beta)]


def _penalty_factors(profile: TrainingProfile, scaling: Scaling) -> np.ndarray:
    """Working coefficient to coefficient per training (population) sd, for each term."""
    rows = profile.rows
    training_sd = np.array([term.sd * math.sqrt((rows - 1) / rows) for term in profile.terms])
    return training_sd / scaling.scales


def _fit(
    source: StatisticsSource,
    family: Family,
    data: _Data,
    sample: Batch,
    scaling: Scaling,
    penalty: Penalty,
    warm: BatchSource | None,
    known: tuple[TrainingProfile, float] | None,  # profile and poisson constant, unless the first pass gathers them
    max_iter: int,
    tol: float,
    passes: int,
) -> GlmFit:
    starts = _starts(family, sample, len(data.names))
    if warm is not None:
        starts = _warm_starts(warm, sample, starts, ScaledPenalty(penalty.l2, penalty.l1), max_iter, tol)
    first = None
    if known is None:
        first, profile, constant = source.evaluate_with_profile(starts, data.names)
    else:
        profile, constant = known
    warnings = problems.check_training_rows(profile, family, data.where, data.target, data.weight)
    scaled = ScaledPenalty(penalty.l2, penalty.l1, _penalty_factors(profile, scaling))
    try:
        model, null = run_irls(source, starts, scaled, profile.weight_sum, max_iter, tol, allow_aliasing=scaled.active, first=first)
    except AliasedTerms as error:
        raise FeatpipeError(problems.aliased_message(error.aliases, data.names, scaling, data.where)) from None
    return _result(model, null, source, family, data.names, data.where, profile, constant, scaling, scaled, max_iter, passes, warnings)


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
        per_sd = np.r_[model.beta[0], model.beta[1:] * penalty.factors]
        message = problems.separation(
            family, statistics.boundary_rows, names, runaway, per_sd, None if inference is None else inference.statistic
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
