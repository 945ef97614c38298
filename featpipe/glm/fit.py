"""Fit a GLM: `Glm` holds the parameters, given up front and checked when it is made; `Glm.fit` works
on a design table where the data is and `Glm.fit_arrays` on in-memory arrays. Each call returns a new
`GlmResult`; nothing learned is kept on the `Glm`, so one fitter serves any number of data sets.

Both run the same steps: a training profile (counts, domain checks, term means and sds), IRLS over a
statistics source for the model and its intercept-only null model together, then inference on the
original scale of the terms. Every source gathers the profile during its first IRLS pass (the SQL
source in the same aggregate query), and the checks run before that pass's statistics are used.

IRLS works on standardized terms, centered and scaled by the mean and population sd of the sample
(close to the training ones), which keeps X'WX well conditioned; the penalty is defined on terms
standardized by the training mean and population sd (see `penalty`), and results are reported on
the terms' own scale.

On an engine the data is read a few times only: a deterministic sample (the first `sample_rows`
training rows; by key order on engines without a stable scan order) is fitted in memory first, so the
passes over the whole table start next to the answer (two or three IRLS passes instead of five to
eight from the intercept-only start). A table no larger than the sample is read once: the sample is
all of it, and IRLS runs on it in memory (on Spark each pass would otherwise be a job of its own, about
a second even for a few thousand rows).

Precision: IRLS stops when the next step would change the deviance by less than `tol` (relative) and
still takes that step, so at tol=1e-10 estimates agree with a fully converged fit to about 1e-9 or
better; X'WX, the deviance and the standard errors are those of the final coefficients (see `irls`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import KW_ONLY, dataclass, field, replace
from functools import partial

import numpy as np

from ..compiler.layout import DesignLayout
from ..engines.base import Engine
from ..errors import FeatpipeError
from ..project import Penalty
from ..project.names import INTERCEPT
from ..sqlgen.statistics import TrainingProfile, design_columns_query
from ..sqlgen.trials import trial_counts_query
from . import problems
from .dispersion import estimated_dispersion, overdispersion_warning, pearson_ratio
from .families import Family, get_family
from .inference import Wald, information_criteria, log_likelihood, wald
from .irls import AliasedTerms, IrlsResult, run_irls
from .linalg import inverse_spd, variance_inflation
from .penalty import ScaledPenalty
from .problems import DataNames
from .result import Coefficient, Convergence, GlmResult, GoodnessOfFit, TrainingRows
from .sandwich import KINDS, Middle, engine_middle, sandwich
from .sources import (
    Batch,
    BatchSource,
    LocalCopy,
    Request,
    Scaling,
    SqlAggregateSource,
    StatisticsSource,
    batch_from_arrow,
    engine_batches,
    in_memory_batches,
)
from .trials import grouped_constant
from .weights import as_repeated_rows

SAMPLE_ROWS = 100_000  # rows of the in-memory warm-start sample
BATCH_ROWS = 131_072  # rows per streamed batch: about 1 MB per term column
SOURCES = ("auto", "sql", "stream", "local")
# What "auto" means per engine: DuckDB streams its rows fast enough to read them on every pass; on
# PostgreSQL an aggregate pass costs about 13 scans and reading the rows out several, so they are read
# once into a local copy (see `LocalCopy`). Spark keeps the aggregates in the cluster: its data may not
# fit one machine, and PySpark brings rows to the driver only one partition at a time.
AUTO_SOURCES = {"duckdb": "stream", "postgres": "local"}


@dataclass(frozen=True)
class Glm:
    """The parameters of a GLM fit, e.g. `Glm("binomial", Penalty(l2=0.01)).fit(engine, layout)`.

    `source` (engine fits): "sql" (one aggregate query per pass, any engine), "stream" (batches through
    numpy, memory one batch), "local" (batches read from the engine once into a local temporary file,
    then from that file) or "auto" (`AUTO_SOURCES`: stream on DuckDB, local on PostgreSQL, sql
    elsewhere; "memory" when the sample holds every training row). `sample_rows` (engine fits): the first
    training rows read up front; they set the working scaling and, when the table has more rows, the
    warm start, else they are the data IRLS runs on. A table sorted by a term gives a poorer
    warm start (more passes), not a different answer. `batch_rows`: rows per batch of a streamed or in-memory source.
    `frequency_weights`: the weights count repeated rows (see `weights`) rather than weigh precision.
    `power`: the tweedie variance power, in (1, 2); None for the other families.
    `trials`: binomial successes out of trials: the target is the proportion and the weights are the trials
    (see `trials`); the log-likelihood then includes the binomial constant.
    `errors`: "model" (from the information matrix), "robust" (sandwich, HC1) or "cluster" (sandwich over
    the design table's cluster column); see `sandwich`. Engine fits only; one more pass over the rows.
    """

    family: str
    penalty: Penalty = field(default_factory=Penalty)
    _: KW_ONLY
    max_iter: int = 50
    tol: float = 1e-10
    source: str = "auto"
    sample_rows: int = SAMPLE_ROWS
    batch_rows: int = BATCH_ROWS
    frequency_weights: bool = False
    power: float | None = None
    errors: str = "model"
    trials: bool = False

    def __post_init__(self) -> None:
        get_family(self.family, self.power)  # raises on an unknown family or a power it does not take
        if not (self.penalty.l2 >= 0 and self.penalty.l1 >= 0):
            raise ValueError(f"penalty l2 and l1 must be zero or more, not {self.penalty.l2!r} and {self.penalty.l1!r}")
        if self.max_iter < 1:
            raise ValueError(f"max_iter must be at least 1, not {self.max_iter!r}")
        if not self.tol > 0:
            raise ValueError(f"tol must be positive, not {self.tol!r}")
        if self.source not in SOURCES:
            raise ValueError(f"unknown statistics source {self.source!r}; use one of {', '.join(SOURCES)}")
        if self.sample_rows < 100:
            raise ValueError("sample_rows must be at least 100: the sample also sets the working scaling")
        if self.batch_rows < 1:
            raise ValueError(f"batch_rows must be at least 1, not {self.batch_rows!r}")
        if self.trials and (self.family != "binomial" or self.frequency_weights):
            raise ValueError("trials go with family binomial, the weights holding the trials")
        if self.errors not in KINDS:
            raise ValueError(f"unknown errors {self.errors!r}; use one of {', '.join(KINDS)}")
        if self.errors != "model" and (self.penalty.l2 > 0 or self.penalty.l1 > 0):
            raise ValueError("a penalized fit has no Wald inference, robust or not; drop errors or the penalty")

    def fit(self, engine: Engine, layout: DesignLayout) -> GlmResult:
        """Fit on the training rows of a design table in `engine`."""
        source = self.source if self.source != "auto" else AUTO_SOURCES.get(engine.name, "sql")
        copy = LocalCopy(engine_batches(engine, layout, self.batch_rows)) if source == "local" else None
        try:
            return self._fit_on(engine, layout, source, copy)
        finally:
            if copy is not None:
                copy.close()

    def _fit_on(self, engine: Engine, layout: DesignLayout, source: str, copy: LocalCopy | None) -> GlmResult:
        family = get_family(self.family, self.power)
        ordered = engine.name != "duckdb"  # DuckDB keeps insertion order: its first rows are already fixed
        sample = batch_from_arrow(engine.fetch_table(design_columns_query(layout, limit=self.sample_rows, ordered=ordered)), layout)
        # A sample that filled its LIMIT is (most likely) a strict subset, worth fitting first; one that did
        # not holds every training row, which "auto" then fits in memory: no more reads of the table.
        filled = len(sample.y) >= self.sample_rows
        passes = 1 if ordered or not filled else 0  # ORDER BY key reads every row once, and so does a short LIMIT
        scaling = Scaling.of(sample.terms)
        data = DataNames(layout.terms, f"design table {layout.table}", layout.target, layout.weight)
        if not filled and self.source == "auto":
            statistics: StatisticsSource = BatchSource("memory", in_memory_batches(sample, self.batch_rows), family, scaling)
        elif copy is not None:
            statistics = BatchSource("local", copy, family, scaling)
        elif source == "stream":
            statistics = BatchSource("stream", engine_batches(engine, layout, self.batch_rows), family, scaling)
        else:
            statistics = SqlAggregateSource(engine, layout, family, scaling)
        warm = BatchSource("sample", in_memory_batches(sample, self.batch_rows), family, scaling) if filled else None
        if self.errors == "cluster" and layout.cluster is None:
            raise ValueError(f"errors 'cluster' needs a cluster column in design table {layout.table}")
        middle = None if self.errors == "model" else partial(engine_middle, engine, layout, family, scaling, self.errors == "cluster")
        pairs = None
        if self.trials:
            pairs = np.array([[float(v) for v in row] for row in engine.fetch(trial_counts_query(layout))]).reshape(-1, 3)
            passes += 1
        return self._solve(
            _Problem(statistics=statistics, family=family, data=data, sample=sample, scaling=scaling, warm=warm, passes=passes,
                     middle=middle, trial_pairs=pairs)
        )

    def fit_arrays(self, X, y, offset=None, weights=None, names: tuple[str, ...] | None = None) -> GlmResult:
        """The same fit on in-memory arrays: X (rows x terms, no intercept column), y, optional offset and
        weights; `names` name the terms (x1, x2, ... by default)."""
        if self.errors != "model":
            raise ValueError("robust standard errors are computed in an engine: use Glm.fit on a design table")
        if self.trials and weights is None:
            raise ValueError("trials need weights: each row's number of trials, y its share of successes")
        family = get_family(self.family, self.power)
        terms = np.asarray(X, dtype=float)
        terms = terms.reshape(len(terms), -1)
        names = tuple(names) if names is not None else tuple(f"x{j + 1}" for j in range(terms.shape[1]))
        rows = Batch(
            np.asarray(y, dtype=float),
            None if offset is None else np.asarray(offset, dtype=float),
            None if weights is None else np.asarray(weights, dtype=float),
            [terms[:, j] for j in range(terms.shape[1])],
        )
        scaling = Scaling.of(rows.terms)
        statistics = BatchSource("arrays", in_memory_batches(rows, self.batch_rows), family, scaling)
        data = DataNames(names, "the arrays", "y", None if weights is None else "weights")
        pairs = None
        if self.trials:
            pairs, counts = np.unique(np.column_stack([rows.y, rows.weight]), axis=0, return_counts=True)
            pairs = np.column_stack([pairs, counts.astype(float)])
        return self._solve(
            _Problem(statistics=statistics, family=family, data=data, sample=rows, scaling=scaling, warm=None, passes=0,
                     trial_pairs=pairs)
        )

    def _solve(self, problem: _Problem) -> GlmResult:
        """IRLS for the model and its null model from the (warm) starts, after the training rows pass the checks."""
        starts = _starts(problem)
        if problem.warm is not None:
            starts = self._warm_starts(problem, starts)
        first, profile, constant = problem.statistics.evaluate_with_profile(starts, problem.data.terms)
        if self.frequency_weights:
            profile = as_repeated_rows(profile, problem.data.where)
        checked = profile
        if problem.trial_pairs is not None:  # proportions of trials: the counts are checked, then each trial counts as a row
            constant = grouped_constant(problem.trial_pairs, problem.data.where, problem.data.target)
            checked = replace(profile, not_binary=0, rows=profile.weight_sum, target_sum=profile.weighted_target_sum)
        warnings = problems.check_training_rows(checked, problem.family, problem.data)
        penalty = ScaledPenalty(self.penalty.l2, self.penalty.l1, _penalty_factors(profile, problem.scaling))
        try:
            model, null = run_irls(
                problem.statistics, starts, penalty, profile.weight_sum, self.max_iter, problem.family.tolerance(self.tol),
                allow_aliasing=penalty.active, first=first,
            )
        except AliasedTerms as error:
            raise FeatpipeError(problems.aliased_message(error.aliases, problem.data, problem.scaling)) from None
        solution = _Solution(model=model, null=null, profile=profile, constant=constant, penalty=penalty, warnings=tuple(warnings),
                             variance_weighted=problem.data.weight is not None and not self.frequency_weights, errors=self.errors)
        return _result(problem, solution, self.max_iter)

    def _warm_starts(self, problem: _Problem, starts: list[Request]) -> list[Request]:
        """Starts fitted on the sample; the plain starts when the sample cannot be fitted cleanly (aliased
        on its rows, not converging, running away)."""
        penalty = ScaledPenalty(self.penalty.l2, self.penalty.l1)
        sample = problem.sample
        total_weight = float(len(sample.y) if sample.weight is None else sample.weight.sum())
        try:
            model, null = run_irls(problem.warm, starts, penalty, total_weight, self.max_iter, self.tol, allow_aliasing=penalty.active)
        except (AliasedTerms, FeatpipeError):
            return starts
        if not (model.converged and null.converged) or problems.runaway_terms(model.step):
            return starts
        return [Request(model.terms, model.beta), Request(null.terms, null.beta)]


@dataclass(frozen=True)
class _Problem:
    """What one fit works on, prepared by `Glm.fit` or `Glm.fit_arrays`."""

    statistics: StatisticsSource  # the training rows, read once per pass
    family: Family
    data: DataNames
    sample: Batch  # rows in memory: the first training rows, or all of them for arrays
    scaling: Scaling  # the working coordinates of IRLS, from the sample
    warm: BatchSource | None  # the sample as a source, when fitting it first gives a warm start
    passes: int  # full reads of the training rows before IRLS
    middle: Callable[[tuple[int, ...], np.ndarray], Middle] | None = None  # the sandwich's middle term at working coefficients
    trial_pairs: np.ndarray | None = None  # grouped binomial: (proportion, trials, rows) per distinct pair


@dataclass(frozen=True)
class _Solution:
    """What IRLS returned, with the figures the result is read from."""

    model: IrlsResult
    null: IrlsResult
    profile: TrainingProfile
    constant: float  # the poisson, gamma or grouped binomial log-likelihood constant (0 for the other families)
    penalty: ScaledPenalty
    warnings: tuple[str, ...]  # from the checks of the training rows
    variance_weighted: bool = False  # weights that weigh precision rather than count rows
    errors: str = "model"  # the standard errors asked for (see `sandwich`)


def _starts(problem: _Problem) -> list[Request]:
    """Model and null model at the intercept of the sample's mean target (kept inside the family's range)."""
    family, sample, size = problem.family, problem.sample, len(problem.data.terms)
    rows = len(sample.y)
    weight = np.ones(rows) if sample.weight is None else sample.weight
    total = float(weight.sum()) if rows else 1.0
    mean = float(weight @ sample.y) / total if rows else 0.5
    if family.link == "logit":
        mean = min(max(mean, 0.5 / (rows + 1)), 1 - 0.5 / (rows + 1))
    elif family.link == "log":
        mean = max(mean, 0.5 / (rows + 1))
    offset = float(weight @ sample.offset) / total if rows and sample.offset is not None else 0.0
    intercept = family.link_of_mean(mean) - offset
    return [Request(tuple(range(size)), np.r_[intercept, np.zeros(size)]), Request((), np.array([intercept]))]


def _penalty_factors(profile: TrainingProfile, scaling: Scaling) -> np.ndarray:
    """Working coefficient to coefficient per training (population) sd, for each term."""
    rows = profile.rows
    training_sd = np.array([term.sd * math.sqrt((rows - 1) / rows) for term in profile.terms])
    return training_sd / scaling.scales


def _result(problem: _Problem, solution: _Solution, max_iter: int) -> GlmResult:
    """Estimates and inference on the terms' own scale, the model-level figures, and every warning."""
    family, data, scaling, penalty = problem.family, problem.data, problem.scaling, solution.penalty
    model, profile = solution.model, solution.profile
    statistics = model.statistics
    transform = scaling.to_original()
    coef = transform @ model.beta
    size = len(coef)
    df_residual = profile.rows - size
    dispersion = estimated_dispersion(family, statistics.deviance, statistics.pearson, df_residual)
    inverse = inverse_spd(statistics.xtwx)
    covariance = inference = robust = None
    sandwich_passes = 0
    if not penalty.active and problem.middle is not None:
        working, robust = sandwich(inverse, problem.middle(model.terms, model.beta), solution.errors, profile.rows)
        sandwich_passes = 1
        covariance = transform @ working @ transform.T
        inference = wald(coef, covariance, family, df_residual, normal=True)
    elif not penalty.active:
        covariance = transform @ (dispersion * inverse) @ transform.T
        inference = wald(coef, covariance, family, df_residual)
    warnings = list(solution.warnings)
    if model.aliases:
        warnings.append(problems.aliased_message(model.aliases, data, scaling))
    # A step that is still large is a runaway once the deviance has settled (or fitted values sit at
    # the boundary); before that it is only an unfinished fit.
    settled = model.converged or statistics.boundary_rows > 0
    runaway = problems.runaway_terms(model.step) if family.name != "gaussian" and settled else []
    if runaway or statistics.boundary_rows:
        per_sd = np.r_[model.beta[0], model.beta[1:] * penalty.factors]
        message = problems.separation(
            family, statistics.boundary_rows, data.terms, runaway, per_sd, None if inference is None else inference.statistic
        )
        if runaway and not penalty.active:
            raise FeatpipeError(f"{data.where}: {message}")
        warnings.append(message)
    if not model.converged:
        warnings.append(problems.not_converged(max_iter, model.change))
    if not solution.null.converged:
        warnings.append("the intercept-only model did not converge: the null deviance is approximate")
    if penalty.active:
        warnings.append(problems.penalized_inference(penalty.l2, penalty.l1))
    pearson = pearson_ratio(statistics.pearson, df_residual)
    overdispersed = overdispersion_warning(family.name, pearson, binary=profile.not_binary == 0)
    if overdispersed:
        warnings.append(overdispersed)
    parameters = penalty.effective_df(statistics.xtwx, model.beta, profile.weight_sum) if penalty.active else size
    llf = log_likelihood(family, statistics.deviance, profile.rows, profile.log_weight_sum, solution.constant,
                         dispersion=dispersion, variance_weighted=solution.variance_weighted)
    aic, bic = information_criteria(llf, parameters, profile.rows)
    return GlmResult(
        family=family.name,
        link=family.link,
        statistic_name="z" if robust is not None else family.statistic_name,
        penalized=penalty.active,
        coefficients=_coefficients((INTERCEPT, *data.terms), coef, inference, variance_inflation(statistics.xtwx, inverse)),
        covariance=None if covariance is None else tuple(tuple(float(v) for v in row) for row in covariance),
        goodness_of_fit=GoodnessOfFit(
            deviance=float(statistics.deviance),
            null_deviance=float(solution.null.statistics.deviance),
            log_likelihood=_maybe(llf),
            aic=_maybe(aic),
            bic=_maybe(bic),
            dispersion=float(dispersion),
            effective_df=float(parameters),
            pearson_chi2=float(statistics.pearson),
        ),
        rows=TrainingRows(n=profile.rows, weight_sum=profile.weight_sum, df_residual=df_residual, term_profiles=profile.terms),
        convergence=Convergence(
            converged=model.converged,
            iterations=model.iterations,
            passes_over_data=problem.passes + problem.statistics.passes + sandwich_passes,
            source=problem.statistics.name,
        ),
        warnings=tuple(warnings),
        robust_errors=robust,
    )


def _maybe(value: float | None) -> float | None:
    return None if value is None else float(value)


def _coefficients(names: tuple[str, ...], coef: np.ndarray, inference: Wald | None, vif: np.ndarray) -> tuple[Coefficient, ...]:
    """One record per coefficient; `vif` holds the terms' only (the intercept has none)."""
    return tuple(
        Coefficient(
            name=name,
            estimate=float(coef[index]),
            inference=None if inference is None else inference.of(index),
            vif=None if index == 0 else float(vif[index - 1]),
        )
        for index, name in enumerate(names)
    )
