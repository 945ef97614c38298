"""One IRLS step, with or without an l2/l1 penalty, from the statistics at the current coefficients.

Scaling (on standardized terms, intercept never penalized), the same as scikit-learn's ElasticNet
and PoissonRegressor and statsmodels' `fit_regularized`:

    objective(b) = deviance(b) / (2 N) + l2 / 2 * ||b||^2 + l1 * ||b||_1,   N = sum of prior weights

For binomial and poisson, deviance / (2 N) is the mean negative log-likelihood up to a constant.

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
    l2: float = 0.0
    l1: float = 0.0

    @property
    def active(self) -> bool:
        return self.l2 > 0 or self.l1 > 0

    def value(self, beta: np.ndarray) -> float:
        terms = beta[1:]
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
        if self.l1 == 0:
            penalized = curvature.copy()
            penalized[1:, 1:] += self.l2 * np.eye(len(beta) - 1)
            rhs = gradient.copy()
            rhs[1:] -= self.l2 * beta[1:]
            new = beta + solve_spd(penalized, rhs)
        else:
            new = _coordinate_descent(curvature, curvature @ beta + gradient, self.l2, self.l1, beta)
        delta = new - beta
        model_change = -gradient @ delta + 0.5 * delta @ curvature @ delta + self.value(new) - self.value(beta)
        return new, max(-2.0 * total_weight * float(model_change), 0.0)


def _coordinate_descent(curvature: np.ndarray, linear: np.ndarray, l2: float, l1: float, start: np.ndarray) -> np.ndarray:
    """Minimize b'Ab/2 - c'b + l2/2 ||b[1:]||^2 + l1 ||b[1:]||_1 one coordinate at a time."""
    b = start.copy()
    diagonal = np.diag(curvature)
    for _ in range(DESCENT_SWEEPS):
        largest = 0.0
        for j in range(len(b)):
            partial = linear[j] - curvature[j] @ b + diagonal[j] * b[j]
            if j == 0:
                value = partial / diagonal[0]
            else:
                value = np.sign(partial) * max(abs(partial) - l1, 0.0) / (diagonal[j] + l2)
            largest = max(largest, abs(value - b[j]))
            b[j] = value
        if largest <= DESCENT_TOLERANCE * max(1.0, float(np.abs(b).max())):
            break
    return b
