"""The AUC's standard error and interval, and the test of two AUCs on the same rows, after DeLong,
DeLong & Clarke-Pearson ("Comparing the areas under two or more correlated receiver operating
characteristic curves: a nonparametric approach", Biometrics 44, 1988).

Everything comes from the class sums of featpipe.sqlgen.ranks (`RankSums`): with D the per-row rank
difference described there, AUC_s = sum over events of D_s / (2 n1 n0), and the covariance of two AUCs
is S10 / n1 + S01 / n0, S10 and S01 the sample covariances (divisor n - 1) of the events' V10 = D / (2 n0)
and of the non-events' V01 = 1 - D / (2 n1).

    >>> from featpipe.sqlgen.ranks import RankSums
    >>> sums = RankSums(2, 2, (6,), (2,), ((20.0,),), ((4.0,),))  # events scored 0.9, 0.6; non-events 0.7, 0.1
    >>> auc_values(sums).tolist()  # 3 of the 4 event / non-event pairs are ordered right
    [0.75]
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..sqlgen.ranks import RankSums

LEVEL = 0.95


def auc_values(sums: RankSums) -> np.ndarray:
    """The AUC of each score (Mann-Whitney, ties counted half)."""
    return np.array(sums.event_sums, dtype=float) / (2.0 * sums.events * sums.non_events)


def auc_covariance(sums: RankSums) -> np.ndarray | None:
    """DeLong's covariance matrix of the AUCs; None with fewer than two rows in a class."""
    n1, n0 = sums.events, sums.non_events
    if n1 < 2 or n0 < 2:
        return None
    s10 = _class_covariance(sums.event_sums, sums.event_products, n1) / (2.0 * n0) ** 2
    s01 = _class_covariance(sums.non_event_sums, sums.non_event_products, n0) / (2.0 * n1) ** 2
    return s10 / n1 + s01 / n0


def _class_covariance(totals, products, rows: int) -> np.ndarray:
    """Sample covariance (divisor rows - 1) of the D columns of one class, from their sums and product sums."""
    totals = np.array(totals, dtype=float)
    return (np.array(products, dtype=float) - np.outer(totals, totals) / rows) / (rows - 1)


def auc_interval(sums: RankSums, level: float = LEVEL) -> tuple[float, float] | None:
    """The normal-approximation interval AUC +- z sqrt(DeLong variance), cut to [0, 1]; None when the
    variance is not defined (fewer than two rows in a class)."""
    # scipy.stats' norm.ppf is scipy.special's ndtri; importing scipy.stats itself takes seconds
    from scipy.special import ndtri

    covariance = auc_covariance(sums)
    if covariance is None:
        return None
    auc = float(auc_values(sums)[0])
    half = float(ndtri(0.5 + level / 2)) * math.sqrt(max(float(covariance[0, 0]), 0.0))
    return max(auc - half, 0.0), min(auc + half, 1.0)


@dataclass(frozen=True)
class PairedAuc:
    """DeLong's test that two scores on the same rows have the same AUC (two-sided)."""

    rows: int
    auc: tuple[float, float]
    difference: float  # first minus second
    std_error: float
    z: float
    p_value: float


def paired_test(sums: RankSums) -> PairedAuc | None:
    """The test for the first two scores of `sums`; None when the difference has no variance (fewer
    than two rows in a class, or two scores that order the rows alike)."""
    # scipy.stats' norm.sf(z) is scipy.special's ndtr(-z)
    from scipy.special import ndtr

    covariance = auc_covariance(sums)
    if covariance is None:
        return None
    variance = float(covariance[0, 0] + covariance[1, 1] - 2.0 * covariance[0, 1])
    first, second = (float(value) for value in auc_values(sums)[:2])
    if not variance > 1e-15 * max(float(covariance[0, 0] + covariance[1, 1]), 1e-300):
        return None
    std_error = math.sqrt(variance)
    z = (first - second) / std_error
    return PairedAuc(sums.events + sums.non_events, (first, second), first - second, std_error, z, float(2.0 * ndtr(-abs(z))))
