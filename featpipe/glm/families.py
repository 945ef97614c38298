"""GLM families with their canonical links, in numpy, matching the SQL of `sqlgen.statistics` row by row.

All three links are canonical, so the working weight is prior weight times the variance function and
the score is sum of w (y - mu) x. Deviance and log-likelihood follow the definitions of R's `glm` and
statsmodels (prior weights act like statsmodels' `var_weights`):

- binomial (logit), y in {0, 1}: unit deviance 2 (ln(1 + e^eta) - y eta); llf = -deviance / 2.
- poisson (log): unit deviance 2 (y ln(y / mu) - (y - mu));
  llf = sum w (y ln mu - mu - ln y!) = -deviance / 2 + sum w (y ln y - y - ln y!).
- gaussian (identity): unit deviance (y - mu)^2; llf at the maximum-likelihood scale
  s2 = deviance / n: -(n ln(2 pi s2) + n - sum ln w) / 2.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod

import numpy as np
from scipy.special import expit, gammaln

from ..project.load import LINKS

# |eta| beyond this puts a fitted probability within 1e-10 of 0 or 1 (binomial), or a fitted mean
# below 1e-10 (poisson, eta < -BOUNDARY_ETA).
BOUNDARY_ETA = math.log((1 - 1e-10) / 1e-10)


class Family(ABC):
    name: str
    link: str
    statistic_name = "z"  # dispersion fixed at 1: normal reference distribution
    estimates_dispersion = False
    # The linear predictor is clamped to +-eta_limit before EXP: far beyond any useful fitted value,
    # and small enough that EXP and sums of EXP stay finite on every engine (PostgreSQL raises on
    # overflow). None: the family takes no EXP.
    eta_limit: float | None = None

    def clamp(self, eta: np.ndarray) -> np.ndarray:
        return eta if self.eta_limit is None else np.clip(eta, -self.eta_limit, self.eta_limit)

    @abstractmethod
    def mean(self, eta: np.ndarray) -> np.ndarray:
        """The inverse link of a clamped linear predictor."""

    @abstractmethod
    def variance(self, mu: np.ndarray) -> np.ndarray:
        """The variance function; times the prior weight it is the IRLS working weight."""

    @abstractmethod
    def unit_deviance(self, y: np.ndarray, eta: np.ndarray, mu: np.ndarray) -> np.ndarray:
        """Each row's deviance contribution before its prior weight."""

    def pearson(self, y: np.ndarray, mu: np.ndarray) -> np.ndarray:
        """Each row's Pearson chi2 (y - mu)^2 / V(mu) before its prior weight; 0 where V(mu) is 0 (the SQL
        leaves those rows out of the sum)."""
        variance = self.variance(mu)
        safe = np.where(variance > 0, variance, 1.0)
        return np.where(variance > 0, (y - mu) ** 2 / safe, 0.0)

    def boundary(self, eta: np.ndarray) -> np.ndarray:
        """Rows whose fitted value is within 1e-10 of the family's boundary."""
        return np.zeros(eta.shape, dtype=bool)

    @abstractmethod
    def link_of_mean(self, mean: float) -> float:
        """The link at a (weighted) mean target, the intercept of a model without terms or offset."""


class Binomial(Family):
    name = "binomial"
    link = LINKS[name]
    eta_limit = 36.0

    def mean(self, eta):
        return expit(eta)

    def variance(self, mu):
        return mu * (1.0 - mu)

    def unit_deviance(self, y, eta, mu):
        softplus = np.maximum(eta, 0.0) + np.log1p(np.exp(-np.abs(eta)))  # ln(1 + e^eta) without overflow
        return 2.0 * (softplus - y * eta)

    def boundary(self, eta):
        return np.abs(eta) > BOUNDARY_ETA

    def link_of_mean(self, mean):
        return math.log(mean / (1.0 - mean))


class Poisson(Family):
    name = "poisson"
    link = LINKS[name]
    eta_limit = 50.0

    def mean(self, eta):
        return np.exp(eta)

    def variance(self, mu):
        return mu

    def unit_deviance(self, y, eta, mu):
        y_ln_y = np.where(y > 0, y * np.log(np.where(y > 0, y, 1.0)), 0.0)
        return 2.0 * (y_ln_y - y * eta + mu - y)

    def boundary(self, eta):
        return eta < -BOUNDARY_ETA

    def link_of_mean(self, mean):
        return math.log(mean)

    @staticmethod
    def likelihood_constant(y: np.ndarray) -> np.ndarray:
        """Per row, y ln y - y - ln y!: the part of the log-likelihood the deviance leaves out."""
        y_ln_y = np.where(y > 0, y * np.log(np.where(y > 0, y, 1.0)), 0.0)
        return y_ln_y - y - gammaln(y + 1.0)


class Gaussian(Family):
    name = "gaussian"
    link = LINKS[name]
    statistic_name = "t"  # dispersion estimated: t with n - p degrees of freedom
    estimates_dispersion = True

    def mean(self, eta):
        return eta

    def variance(self, mu):
        return np.ones_like(mu)

    def unit_deviance(self, y, eta, mu):
        return (y - mu) ** 2

    def link_of_mean(self, mean):
        return mean


FAMILIES = {family.name: family for family in (Binomial(), Poisson(), Gaussian())}


def get_family(name: str) -> Family:
    try:
        return FAMILIES[name]
    except KeyError:
        raise ValueError(f"unknown family {name!r}; use one of {', '.join(FAMILIES)}") from None
