"""Grouped binomial data: successes out of a number of trials per row, fitted as the proportion
successes / trials with the trials as prior weights (as R's glm with cbind(successes, failures)).

The log-likelihood then includes the binomial constant: per row ln C(n, k) plus the saturated model's
k ln(k / n) + (n - k) ln(1 - k / n), so that llf = -deviance / 2 + constant is R's logLik and statsmodels'
llf. The constant needs ln Gamma, which PostgreSQL and Spark lack, so it is summed here from the rows
counted per distinct (proportion, trials) pair.
"""

from __future__ import annotations

import numpy as np
from scipy.special import gammaln, xlogy

from ..errors import FeatpipeError

TOLERANCE = 1e-9  # a success count within this of a whole number is read as that number


def grouped_constant(pairs: np.ndarray, where: str, target: str) -> float:
    """The binomial constant of rows given as (proportion, trials, rows) triples; refuses counts that are
    not whole numbers, trials below 1 and more successes than trials."""
    if not len(pairs):
        return 0.0
    share, n, rows = pairs[:, 0], pairs[:, 1], pairs[:, 2]
    k = share * n
    bad_trials = (n < 1) | (np.abs(n - np.round(n)) > TOLERANCE)
    if bad_trials.any():
        raise FeatpipeError(f"{where}: the trials must be a whole number of at least 1, but is {n[bad_trials][0]:g} on "
                            f"{int(rows[bad_trials].sum())} training rows; fix the trials column")
    too_many = share > 1 + TOLERANCE
    if too_many.any():
        raise FeatpipeError(f"{where}: successes '{target}' exceed the trials on {int(rows[too_many].sum())} training "
                            "rows; each row counts successes out of its trials")
    not_whole = (share < 0) | (np.abs(k - np.round(k)) > TOLERANCE * np.maximum(n, 1))
    if not_whole.any():
        raise FeatpipeError(f"{where}: successes '{target}' must be a whole number from 0 to the trials, but is "
                            f"{k[not_whole][0]:g} on {int(rows[not_whole].sum())} training rows; fix the successes column")
    k, n = np.round(k), np.round(n)
    per_row = gammaln(n + 1) - gammaln(k + 1) - gammaln(n - k + 1) + xlogy(k, k / n) + xlogy(n - k, (n - k) / n)
    return float(rows @ per_row)
