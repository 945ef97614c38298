"""Wald inference and information criteria from the final X'WX, on the original scale of the terms."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import gammaln, ndtr, ndtri, stdtr, stdtrit

from .families import Family
from .result import Inference

LEVEL = 0.95


@dataclass(frozen=True)
class Wald:
    stderr: np.ndarray
    statistic: np.ndarray
    p_value: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray

    def of(self, index: int) -> Inference:
        """The inference record of coefficient `index` (0 is the intercept)."""
        return Inference(
            float(self.stderr[index]), float(self.statistic[index]), float(self.p_value[index]),
            float(self.ci_low[index]), float(self.ci_high[index]),
        )


def wald(coef: np.ndarray, covariance: np.ndarray, family: Family, df_residual: int, *, normal: bool = False) -> Wald:
    """Standard errors, z (or t with `df_residual` degrees of freedom), two-sided p-values, 95% intervals;
    `normal` takes z whatever the family (sandwich standard errors are a large-sample result)."""
    stderr = np.sqrt(np.clip(np.diag(covariance), 0.0, None))
    with np.errstate(divide="ignore", invalid="ignore"):
        statistic = coef / stderr
    # scipy.special's functions that scipy.stats' t.sf, t.ppf, norm.sf and norm.ppf call, the same
    # values, without importing scipy.stats (seconds on a busy machine) for every fit.
    if family.estimates_dispersion and not normal:
        p_value = 2.0 * stdtr(df_residual, -np.abs(statistic))
        quantile = stdtrit(df_residual, 0.5 + LEVEL / 2)
    else:
        p_value = 2.0 * ndtr(-np.abs(statistic))
        quantile = ndtri(0.5 + LEVEL / 2)
    return Wald(stderr, statistic, p_value, coef - quantile * stderr, coef + quantile * stderr)


def log_likelihood(family: Family, deviance: float, rows: int, log_weight_sum: float, constant: float, *,
                   dispersion: float = 1.0, variance_weighted: bool = False) -> float | None:
    """llf as statsmodels and R define it (see `families`); `constant` is the poisson or gamma data term.

    gamma (statsmodels' llf, at the Pearson dispersion phi, each row counted once or as its frequency weight):
    -deviance / (2 phi) - n (1 + ln phi) / phi - n ln Gamma(1 / phi) - sum ln y. None where a sum cannot give it:
    gamma with variance weights (it needs ln Gamma of each weight / phi), tweedie (its density is an infinite
    series per row) and the quasi families (no likelihood at all, as R's glm says).
    """
    if family.name == "gamma" and not variance_weighted:
        return -0.5 * deviance / dispersion - rows * (1.0 + math.log(dispersion)) / dispersion - rows * gammaln(1.0 / dispersion) + constant
    if family.name in ("gamma", "tweedie", "quasipoisson", "quasibinomial"):
        return None
    if family.name == "gaussian":
        scale = deviance / rows
        return -0.5 * (rows * math.log(2.0 * math.pi * scale) + rows - log_weight_sum)
    # poisson: its data term; binomial: 0 for a 0/1 target, the binomial constant for successes out of trials
    return -0.5 * deviance + constant


def information_criteria(llf: float | None, parameters: float, rows: float) -> tuple[float | None, float | None]:
    """AIC = -2 llf + 2 k (as statsmodels' GLM `aic`: k counts the coefficients, not the scale) and
    BIC = -2 llf + k ln n (statsmodels' `bic_llf`); None without a log-likelihood."""
    if llf is None:
        return None, None
    return -2.0 * llf + 2.0 * parameters, -2.0 * llf + parameters * math.log(rows)
