"""What a GLM fit learned, kept apart from the parameters that asked for it (`fit.Glm`).

One record per coefficient, intercept first, with its Wald inference when plain inference holds;
then the model-level figures grouped as a practitioner reads them: goodness of fit (R's `glm` summary,
statsmodels' GLM results), the training rows, and how IRLS got there.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields

from ..sqlgen.statistics import TermProfile


@dataclass(frozen=True)
class Inference:
    """Wald inference for one coefficient, on the original scale of its term."""

    std_error: float
    statistic: float  # z, or t for gaussian (`GlmResult.statistic_name`)
    p_value: float  # two-sided
    ci_low: float  # 95% Wald interval
    ci_high: float


@dataclass(frozen=True)
class Coefficient:
    name: str
    estimate: float
    inference: Inference | None  # None for a penalized fit: plain Wald inference does not hold
    vif: float | None  # None for the intercept

    def inference_figures(self) -> dict[str, float | None]:
        """The Wald figures by their `Inference` names, each None when there is no inference."""
        if self.inference is None:
            return dict.fromkeys(figure.name for figure in fields(Inference))
        return asdict(self.inference)


@dataclass(frozen=True)
class GoodnessOfFit:
    deviance: float
    null_deviance: float  # intercept-only model with the same offset and weights
    log_likelihood: float | None  # None where the family has no log-likelihood a sum gives (see inference)
    aic: float | None  # -2 llf + 2 k, k = coefficients (the effective degrees of freedom of a penalized fit)
    bic: float | None  # -2 llf + k ln n
    dispersion: float  # Pearson chi2 / (n - p) when the family estimates it (gaussian, gamma, tweedie, quasi), 1 otherwise
    effective_df: float  # trace of the hat matrix: the coefficients without a penalty, fewer with one
    pearson_chi2: float  # sum of w (y - mu)^2 / V(mu)


@dataclass(frozen=True)
class TrainingRows:
    n: int
    weight_sum: float
    df_residual: int  # n minus the coefficients
    term_profiles: tuple[TermProfile, ...]


@dataclass(frozen=True)
class Convergence:
    converged: bool
    iterations: int  # IRLS passes over the full training rows for the model
    passes_over_data: int  # every full read of the training rows, profile included
    source: str  # "sql", "stream" or "arrays"


@dataclass(frozen=True)
class RobustErrors:
    """How a fit's sandwich standard errors were made, as the fitted file records it."""

    kind: str  # "HC1" or "cluster"
    clusters: int  # rows for HC1
    correction: float  # the small-sample factor the sandwich was multiplied by

    def record(self) -> dict:
        return {"kind": self.kind, "clusters": self.clusters, "correction": self.correction}


@dataclass(frozen=True)
class GlmResult:
    """A fitted GLM. `coefficients` and the rows and columns of `covariance` follow the same order."""

    family: str
    link: str
    statistic_name: str  # "z", or "t" when the dispersion is estimated
    penalized: bool
    coefficients: tuple[Coefficient, ...]
    covariance: tuple[tuple[float, ...], ...] | None  # None for a penalized fit
    goodness_of_fit: GoodnessOfFit
    rows: TrainingRows
    convergence: Convergence
    warnings: tuple[str, ...]
    robust_errors: RobustErrors | None = None  # how sandwich standard errors were made; None: the model's own

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(coefficient.name for coefficient in self.coefficients)

    @property
    def estimates(self) -> tuple[float, ...]:
        return tuple(coefficient.estimate for coefficient in self.coefficients)
