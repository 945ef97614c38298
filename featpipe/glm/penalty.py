"""One IRLS step, with or without an l2/l1 penalty, from the statistics at the current coefficients.

Scaling (on standardized terms, intercept never penalized), the same as scikit-learn's ElasticNet
and PoissonRegressor and statsmodels' `fit_regularized`:

    objective(b) = deviance(b) / (2 N) + l2 / 2 * ||b||^2 + l1 * ||b||_1,   N = sum of prior weights

For binomial and poisson, deviance / (2 N) is the mean negative log-likelihood up to a constant.
"Standardized" means centered and divided by the training population sd (ddof=0, as scikit-learn's
StandardScaler); IRLS may work on a sample's scaling, so each term carries a factor converting its
working coefficient to the training one.

The step minimizes the quadratic model of the deviance at beta,
deviance(b) ~ deviance(beta) - 2 U'(b - beta) + (b - beta)' H (b - beta) with H = X'WX and U the
score, plus the penalty: a Newton step without penalty, a ridge solve with l2 only, coordinate
descent (soft thresholding) with l1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .linalg import solve_spd

DESCENT_TOLERANCE = 1e-13  # largest coordinate change (relative) that ends coordinate descent
DESCENT_SWEEPS = 100_000


@dataclass(frozen=True)
class ScaledPenalty:
    """The penalty on the working coefficients of the terms.

    `factors` (one per term) turn a working coefficient into one per training sd: IRLS may work on
    terms scaled by a sample's sd, while the penalty is defined on the training sd.
    """

    l2: float = 0.0
    l1: float = 0.0
    factors: np.ndarray | None = None

    @property
    def active(self) -> bool:
        return self.l2 > 0 or self.l1 > 0

    def for_terms(self, terms: tuple[int, ...]) -> ScaledPenalty:
        """The penalty of a model using only `terms` (indices into the factors)."""
        factors = None if self.factors is None else self.factors[list(terms)]
        return ScaledPenalty(self.l2, self.l1, factors)

    def _factors(self, size: int) -> np.ndarray:
        return np.ones(size) if self.factors is None else self.factors

    def value(self, beta: np.ndarray) -> float:
        terms = beta[1:] * self._factors(len(beta) - 1)
        return 0.5 * self.l2 * float(terms @ terms) + self.l1 * float(np.abs(terms).sum())

    def step(self, xtwx: np.ndarray, score: np.ndarray, beta: np.ndarray, total_weight: float) -> tuple[np.ndarray, float]:
        """The next coefficients and the decrease of the objective the quadratic model predicts.

        The decrease is in deviance units (2 N times the objective's decrease).
        """
        if not self.active:
            delta = solve_spd(xtwx, score)
            return beta + delta, float(score @ delta)
        curvature = xtwx / total_weight
        gradient = score / total_weight
        squares = self._factors(len(beta) - 1) ** 2
        if self.l1 == 0:
            penalized = curvature.copy()
            penalized[1:, 1:] += np.diag(self.l2 * squares)
            rhs = gradient.copy()
            rhs[1:] -= self.l2 * squares * beta[1:]
            new = beta + solve_spd(penalized, rhs)
        else:
            l1 = np.r_[0.0, self.l1 * self._factors(len(beta) - 1)]
            l2 = np.r_[0.0, self.l2 * squares]
            new = _coordinate_descent(curvature, curvature @ beta + gradient, l2, l1, beta)
        delta = new - beta
        model_change = -gradient @ delta + 0.5 * delta @ curvature @ delta + self.value(new) - self.value(beta)
        return new, max(-2.0 * total_weight * float(model_change), 0.0)

    def effective_df(self, xtwx: np.ndarray, beta: np.ndarray, total_weight: float) -> float:
        """The effective degrees of freedom of the fit at `beta`: the trace of its hat matrix,
        tr((X'WX + P)^-1 X'WX) over the coefficients an l1 penalty leaves nonzero (all of them under l2
        alone; the count of nonzero coefficients under l1 alone). Without a penalty, the coefficients.

        A penalty shrinks the coefficients together, so the fit spends fewer degrees of freedom than it
        has coefficients; AIC and BIC of a penalized fit count these instead.
        """
        kept = [0] + [j for j in range(1, len(beta)) if beta[j] != 0.0]
        curvature = xtwx[np.ix_(kept, kept)] / total_weight
        if not self.active:
            return float(len(kept))
        penalized = curvature.copy()
        squares = self._factors(len(beta) - 1)[np.array(kept[1:], dtype=int) - 1] ** 2
        penalized[1:, 1:] += np.diag(self.l2 * squares)
        return float(np.trace(solve_spd(penalized, curvature)))


def _coordinate_descent(curvature: np.ndarray, linear: np.ndarray, l2: np.ndarray, l1: np.ndarray, start: np.ndarray) -> np.ndarray:
    """Minimize b'Ab/2 - c'b + sum l2_j b_j^2 / 2 + sum l1_j |b_j| one coordinate at a time
    (l2_0 = l1_0 = 0: the intercept is free)."""
    b = start.copy()
    diagonal = np.diag(curvature)
    for _ in range(DESCENT_SWEEPS):
        largest = 0.0
        for j in range(len(b)):
            partial = linear[j] - curvature[j] @ b + diagonal[j] * b[j]
            value = np.sign(partial) * max(abs(partial) - l1[j], 0.0) / (diagonal[j] + l2[j])
            largest = max(largest, abs(value - b[j]))
            b[j] = value
        if largest <= DESCENT_TOLERANCE * max(1.0, float(np.abs(b).max())):
            break
    return b
