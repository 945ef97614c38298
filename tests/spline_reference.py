"""The restricted cubic spline basis in plain numpy, written from the published formula, as the reference
the tests compare with.

Harrell, Regression Modeling Strategies, 2nd ed., eq. 2.25: with knots t_1 < .. < t_k, the columns are x
and, for j = 1 .. k-2, (x - t_j)^3+ - (x - t_{k-1})^3+ (t_k - t_j) / (t_k - t_{k-1})
+ (x - t_k)^3+ (t_{k-1} - t_j) / (t_k - t_{k-1}), each normalised by (t_k - t_1)^2 as Harrell's
rcspline.eval does.
"""

from __future__ import annotations

import numpy as np


def restricted_cubic_spline(x: np.ndarray, knots) -> list[np.ndarray]:
    """The k-1 basis columns of x for the k knots, x itself first."""
    t, k = np.asarray(knots, dtype=float), len(knots)

    def plus3(u):
        return np.where(u > 0, u, 0.0) ** 3

    return [x] + [
        (plus3(x - t[j]) - plus3(x - t[k - 2]) * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
         + plus3(x - t[k - 1]) * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2])) / (t[k - 1] - t[0]) ** 2
        for j in range(k - 2)]
