"""Small dense linear algebra on X'WX: Cholesky solves with a least-squares fallback, aliasing."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import LinAlgError, cho_factor, cho_solve

# A column whose part not explained by the columns before it (in the X'WX metric, intercept
# partialled out) is below this share of its own variance is aliased: a VIF above 1e10.
ALIAS_TOLERANCE = 1e-10


def solve_spd(matrix: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Solve a symmetric positive definite system by Cholesky; least squares when it is singular."""
    try:
        return cho_solve(cho_factor(matrix), rhs)
    except LinAlgError:
        return np.linalg.lstsq(matrix, rhs, rcond=None)[0]


def inverse_spd(matrix: np.ndarray) -> np.ndarray:
    return solve_spd(matrix, np.eye(len(matrix)))


@dataclass(frozen=True)
class Alias:
    """Column `column` equals sum(coefficients * columns of `basis`) on the weighted rows.

    Indices are into X'WX: 0 is the intercept column.
    """

    column: int
    basis: tuple[int, ...]
    coefficients: np.ndarray


def find_aliased(xtwx: np.ndarray, tolerance: float = ALIAS_TOLERANCE) -> list[Alias]:
    """Columns that are (numerically) linear combinations of the columns before them.

    Walks the columns in order, keeping each one that adds something new, so the later of two
    duplicate terms is the one reported, together with the combination of kept columns it equals.
    """
    kept = [0]
    aliases = []
    for j in range(1, len(xtwx)):
        centered = xtwx[j, j] - xtwx[0, j] ** 2 / xtwx[0, 0]
        basis = xtwx[np.ix_(kept, kept)]
        coefficients = solve_spd(basis, xtwx[kept, j])
        unexplained = xtwx[j, j] - xtwx[kept, j] @ coefficients
        if centered <= 0 or unexplained <= tolerance * centered:
            aliases.append(Alias(j, tuple(kept), coefficients))
        else:
            kept.append(j)
    return aliases


def variance_inflation(xtwx: np.ndarray, inverse: np.ndarray) -> np.ndarray:
    """VIF of each term column (not the intercept) from X'WX and its inverse.

    VIF_j = A_jj (A^-1)_jj with A the term block of X'WX after partialling out the intercept; the
    term block of (X'WX)^-1 is A^-1. This equals 1 / (1 - R_j^2) of term j on the other terms in
    the IRLS-weighted metric (the plain VIF when the weights are all equal, as for unweighted
    gaussian fits).
    """
    centered = np.diag(xtwx)[1:] - xtwx[0, 1:] ** 2 / xtwx[0, 0]
    return centered * np.diag(inverse)[1:]
