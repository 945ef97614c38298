"""Rao's score test for adding one column to a fitted GLM, from sums computed in the engine.

At the current fit (fitted means mu, working weights W = w V(mu), prior weights w, dispersion phi)
with model columns X (the intercept first) and a candidate column z:

    A = X'WX,  b = X'W z,  U_X = X'(w (y - mu)),  U = z'(w (y - mu))
    I = z'W z - b' A^-1 b                  the information of z left after the model's columns
    U* = U - b' A^-1 U_X                   the score of z with the model's own score projected out
    statistic = U*^2 / (phi I)             chi-square on 1 df under the current model (Rao 1948)

At the maximum likelihood fit U_X = 0 and U* = U; keeping the term makes the statistic exact at
fitted coefficients rounded to 12 digits, and unchanged by a shift of z (the intercept absorbs it).
The canonical links make (y - mu) the score and W the information. One Newton step from the current
fit estimates the candidate's coefficient, U*/I, and the deviance it removes, U*^2/I (for gaussian
exactly the drop in the residual sum of squares; binomial and poisson have phi = 1).

    >>> import numpy as np
    >>> model = ModelSums(rows=4, residual_squares=2.0, score=np.zeros(1), xtwx=np.array([[4.0]]))
    >>> test = score_test(model, CandidateSums(count=4, score=2.0, square=5.0, cross=np.array([0.0])), dispersion=1.0)
    >>> round(test.statistic, 6), round(test.estimate, 6)
    (0.8, 0.4)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

CONSTANT = 1e-12  # weighted variance below this share of the weighted square sum: the candidate is constant
COLLINEAR = 1e-8  # information left below this share of its variance: the model's terms already span it


@dataclass(frozen=True)
class ModelSums:
    rows: int
    residual_squares: float  # sum of w (y - mu)^2
    score: np.ndarray  # U_X, intercept first
    xtwx: np.ndarray  # A


@dataclass(frozen=True)
class CandidateSums:
    count: int  # rows where the candidate has a value
    score: float  # U
    square: float  # z'Wz
    cross: np.ndarray  # b = X'Wz, intercept first


@dataclass(frozen=True)
class ScoreTest:
    statistic: float
    p_value: float
    estimate: float  # one-step estimate of the candidate's coefficient
    deviance_gain: float  # approximate drop of the deviance when it is added


def read_model_sums(values, terms: int) -> ModelSums:
    """`ModelSums` from the model part of the sums query (see sqlgen.suggest.score_sums_query)."""
    size = terms + 1
    rows, squares, *rest = (0.0 if v is None else float(v) for v in values)
    xtwx = np.zeros((size, size))
    xtwx[np.triu_indices(size)] = rest[size:]
    xtwx = xtwx + np.triu(xtwx, 1).T
    return ModelSums(int(rows), squares, np.array(rest[:size]), xtwx)


def read_candidate_sums(values) -> CandidateSums:
    count, score, square, *cross = (0.0 if v is None else float(v) for v in values)
    return CandidateSums(int(count), score, square, np.array(cross))


def dispersion(family: str, model: ModelSums) -> float:
    """phi: 1 for binomial and poisson; for gaussian the residual mean square on n - p degrees of freedom."""
    if family != "gaussian":
        return 1.0
    return model.residual_squares / (model.rows - len(model.score))


def drop_reason(model: ModelSums, candidate: CandidateSums) -> str | None:
    """'constant' or 'collinear' when the candidate adds no direction to the model's columns, else None."""
    spread = candidate.square - candidate.cross[0] ** 2 / model.xtwx[0, 0]
    if spread <= CONSTANT * max(candidate.square, np.finfo(float).tiny):
        return "constant"
    if _information(model, candidate) <= COLLINEAR * spread:
        return "collinear"
    return None


def score_test(model: ModelSums, candidate: CandidateSums, dispersion: float) -> ScoreTest:
    """The test of adding the candidate (one that `drop_reason` keeps)."""
    information = _information(model, candidate)
    score = candidate.score - candidate.cross @ np.linalg.solve(model.xtwx, model.score)
    statistic = score * score / (dispersion * information)
    return ScoreTest(statistic=float(statistic), p_value=float(stats.chi2.sf(statistic, 1)),
                     estimate=float(score / information), deviance_gain=float(score * score / information))


def _information(model: ModelSums, candidate: CandidateSums) -> float:
    return float(candidate.square - candidate.cross @ np.linalg.solve(model.xtwx, candidate.cross))


def holm(p_values) -> np.ndarray:
    """Holm's step-down adjusted p-values (Holm 1979), in the order given."""
    p = np.asarray(p_values, dtype=float)
    order = np.argsort(p, kind="stable")
    m = len(p)
    stepped = np.maximum.accumulate((m - np.arange(m)) * p[order])
    adjusted = np.empty(m)
    adjusted[order] = np.minimum(stepped, 1.0)
    return adjusted
