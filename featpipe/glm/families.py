"""GLM families with their canonical links, in numpy, matching the SQL of `sqlgen.statistics` row by row.

Binomial, poisson and gaussian have canonical links, so the working weight is prior weight times the
variance function and the score is sum of w (y - mu) x. Gamma and tweedie use the log link, which is
not canonical for them: Fisher scoring then takes the working weight w mu^2 / V(mu) and the score
sum of w (y - mu) mu / V(mu) x (`working_weight`, `score_residual`), the expected information R's glm
and statsmodels use. Deviance and log-likelihood follow the definitions of R's `glm` and statsmodels
(prior weights act like statsmodels' `var_weights`):

- binomial (logit), y in {0, 1}: unit deviance 2 (ln(1 + e^eta) - y eta); llf = -deviance / 2.
- poisson (log): unit deviance 2 (y ln(y / mu) - (y - mu));
  llf = sum w (y ln mu - mu - ln y!) = -deviance / 2 + sum w (y ln y - y - ln y!).
- gaussian (identity): unit deviance (y - mu)^2; llf at the maximum-likelihood scale
  s2 = deviance / n: -(n ln(2 pi s2) + n - sum ln w) / 2.
- gamma (log), y > 0: unit deviance 2 ((y - mu) / mu - ln(y / mu)); see `log_families`.
- tweedie (log) with power p in (1, 2), y >= 0: unit deviance
  2 (y^(2-p) / ((1-p)(2-p)) - y mu^(1-p) / (1-p) + mu^(2-p) / (2-p)); see `log_families`.
- quasipoisson and quasibinomial: the poisson and binomial fits, with the dispersion estimated.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod

import numpy as np
from scipy.special import gammaln, xlogy

from ..project.load import LINKS

# |eta| beyond this puts a fitted probability within 1e-10 of 0 or 1 (binomial), or a fitted mean
# below 1e-10 (poisson, eta < -BOUNDARY_ETA).
BOUNDARY_ETA = math.log((1 - 1e-10) / 1e-10)


class Family(ABC):
    name: str
    link: str
    statistic_name = "z"  # dispersion fixed at 1: normal reference distribution
    estimates_dispersion = False
    power: float | None = None  # the tweedie variance power
    # The linear predictor is clamped to +-eta_limit before EXP: far beyond any useful fitted value,
    # and small enough that EXP and sums of EXP stay finite on every engine (PostgreSQL raises on
    # overflow). None: the family takes no EXP.
    eta_limit: float | None = None

    def tolerance(self, tol: float) -> float:
        """The IRLS stopping tolerance giving estimates as exact as `tol` does for a canonical link, whose last
        (Newton) step squares the remaining error."""
        return tol

    def clamp(self, eta: np.ndarray) -> np.ndarray:
        return eta if self.eta_limit is None else np.clip(eta, -self.eta_limit, self.eta_limit)

    @abstractmethod
    def mean(self, eta: np.ndarray) -> np.ndarray:
        """The inverse link of a clamped linear predictor."""

    @abstractmethod
    def variance(self, mu: np.ndarray) -> np.ndarray:
        """The variance function; times the prior weight it is the IRLS working weight."""

    def saturated_deviance(self, y: np.ndarray) -> np.ndarray | None:
        """The part of each row's unit deviance that depends on y alone (None: no such part). It is the same
        at every coefficient vector, so a source sums it once per fit rather than once per pass and model."""
        return None

    @abstractmethod
    def fitted_deviance(self, y: np.ndarray, eta: np.ndarray, mu: np.ndarray) -> np.ndarray:
        """Each row's unit deviance less its `saturated_deviance`, before its prior weight."""

    def working_weight(self, mu: np.ndarray) -> np.ndarray:
        """The IRLS working weight before the prior weight: V(mu) for a canonical link."""
        return self.variance(mu)

    def score_residual(self, y: np.ndarray, mu: np.ndarray) -> np.ndarray:
        """A row's score contribution per design value before the prior weight: y - mu for a canonical link."""
        return y - mu

    def pearson(self, y: np.ndarray, mu: np.ndarray) -> np.ndarray:
        """Each row's Pearson chi2 (y - mu)^2 / V(mu) before its prior weight; 0 where V(mu) is 0 (the SQL
        leaves those rows out of the sum)."""
        variance = self.variance(mu)
        squared = np.square(y - mu)
        return np.divide(squared, variance, out=np.zeros_like(squared), where=variance > 0)

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
        return 1.0 / (1.0 + np.exp(-eta))  # as the SQL writes it; eta is clamped, so EXP stays finite

    def variance(self, mu):
        return mu * (1.0 - mu)

    def saturated_deviance(self, y):
        """A proportion's saturated term 2 (y ln y + (1 - y) ln(1 - y)); None where every y is 0 or 1 (the
        term is exactly 0 there, and its two logarithms a row cost a third of a first pass's profile)."""
        if not ((y > 0) & (y < 1)).any():
            return None
        return 2.0 * (xlogy(y, y) + xlogy(1.0 - y, 1.0 - y))

    def fitted_deviance(self, y, eta, mu):
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

    def saturated_deviance(self, y):
        return 2.0 * np.where(y > 0, y * np.log(np.where(y > 0, y, 1.0)), 0.0)  # 2 y ln y

    def fitted_deviance(self, y, eta, mu):
        return 2.0 * (mu - y * eta - y)

    def boundary(self, eta):
        return eta < -BOUNDARY_ETA

    def link_of_mean(self, mean):
        return math.log(mean)

    @staticmethod
    def likelihood_constant(y: np.ndarray) -> np.ndarray:
        """Per row, y ln y - y - ln y!: the part of the log-likelihood the deviance leaves out."""
        y_ln_y = np.where(y > 0, y * np.log(np.where(y > 0, y, 1.0)), 0.0)
        return y_ln_y - y - gammaln(y + 1.0)


class QuasiPoisson(Poisson):
    """Poisson's mean, variance function and deviance, with the dispersion estimated by Pearson chi2 / df
    (R's quasipoisson): the estimates are poisson's, the standard errors scaled by the root of the dispersion."""

    name = "quasipoisson"
    link = LINKS[name]
    statistic_name = "t"
    estimates_dispersion = True
    likelihood_constant = None  # no likelihood: the poisson data term is not needed


class QuasiBinomial(Binomial):
    """Binomial's mean, variance function and deviance, with the dispersion estimated by Pearson chi2 / df
    (R's quasibinomial)."""

    name = "quasibinomial"
    link = LINKS[name]
    statistic_name = "t"
    estimates_dispersion = True


class Gaussian(Family):
    name = "gaussian"
    link = LINKS[name]
    statistic_name = "t"  # dispersion estimated: t with n - p degrees of freedom
    estimates_dispersion = True

    def mean(self, eta):
        return eta

    def variance(self, mu):
        return np.ones_like(mu)

    def fitted_deviance(self, y, eta, mu):
        return (y - mu) ** 2  # as one square: split into y^2 - 2 y mu + mu^2 it would cancel

    def link_of_mean(self, mean):
        return mean


class _LogLink(Family):
    """A family with the log link that is not its canonical link (gamma, tweedie); dispersion estimated."""

    statistic_name = "t"
    estimates_dispersion = True
    eta_limit = 50.0

    def tolerance(self, tol):
        """Fisher scoring with a non-canonical link converges linearly, so the last step does not square the
        error: stop at the square of the tolerance (the predicted change is a sum of squares, exact far below
        the deviance's own rounding)."""
        return tol * tol

    def mean(self, eta):
        return np.exp(eta)

    def working_weight(self, mu):
        return mu**2 / self.variance(mu)

    def score_residual(self, y, mu):
        return (y - mu) * mu / self.variance(mu)

    def boundary(self, eta):
        return eta < -BOUNDARY_ETA

    def link_of_mean(self, mean):
        return math.log(mean)


class Gamma(_LogLink):
    name = "gamma"
    link = LINKS[name]

    def variance(self, mu):
        return mu**2

    def saturated_deviance(self, y):
        return -2.0 * np.log(np.where(y > 0, y, np.nan))  # NaN where y <= 0, refused before a fit

    def fitted_deviance(self, y, eta, mu):
        return 2.0 * ((y - mu) / mu + eta)

    @staticmethod
    def likelihood_constant(y: np.ndarray) -> np.ndarray:
        """Per row, -ln y: the part of the gamma log-likelihood that depends on the target alone (0 where y is
        not positive: such rows are refused before a fit)."""
        return -np.log(np.where(y > 0, y, 1.0))


class Tweedie(_LogLink):
    name = "tweedie"
    link = LINKS[name]

    def __init__(self, power: float | None):
        if power is None or not 1.0 < power < 2.0:
            raise ValueError(f"the tweedie family needs a power strictly between 1 and 2, not {power!r}")
        self.power = float(power)

    def variance(self, mu):
        return mu**self.power

    def saturated_deviance(self, y):
        p = self.power
        return 2.0 * np.where(y > 0, np.power(np.where(y > 0, y, 1.0), 2.0 - p), 0.0) / ((1.0 - p) * (2.0 - p))

    def fitted_deviance(self, y, eta, mu):
        p = self.power
        return 2.0 * (np.exp((2.0 - p) * eta) / (2.0 - p) - y * np.exp((1.0 - p) * eta) / (1.0 - p))


FAMILIES = {family.name: family for family in (Binomial(), Poisson(), Gaussian(), Gamma(), QuasiPoisson(), QuasiBinomial())}


def get_family(name: str, power: float | None = None) -> Family:
    """The family called `name`; tweedie takes its variance `power` in (1, 2), the others none."""
    if name == "tweedie":
        return Tweedie(power)
    if power is not None:
        raise ValueError(f"only the tweedie family takes a power, not {name!r}")
    try:
        return FAMILIES[name]
    except KeyError:
        raise ValueError(f"unknown family {name!r}; use one of {', '.join([*FAMILIES, 'tweedie'])}") from None

