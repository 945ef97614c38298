"""DeLong's AUC covariance in plain numpy, written from the paper, as the reference the tests compare with.

DeLong, DeLong & Clarke-Pearson, "Comparing the areas under two or more correlated receiver operating
characteristic curves: a nonparametric approach", Biometrics 44 (1988): with the kernel
psi(x, y) = 1 if x > y, 1/2 if x = y, 0 otherwise, each event's component is the mean of psi against
every non-event, each non-event's the mean against every event, and the covariance of the AUCs is
S10 / n1 + S01 / n0 with S the sample covariances of those components. O(n1 n0): small data only.
"""

from __future__ import annotations

import numpy as np


def delong_reference(y: np.ndarray, scores: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The AUC of each score and their covariance matrix (k x k)."""
    events, non_events = y == 1, y == 0
    v10, v01 = [], []
    for score in scores:
        above, tied = score[events][:, None] > score[non_events][None, :], score[events][:, None] == score[non_events][None, :]
        psi = above + 0.5 * tied
        v10.append(psi.mean(axis=1))
        v01.append(psi.mean(axis=0))
    aucs = np.array([component.mean() for component in v10])
    covariance = np.atleast_2d(np.cov(np.array(v10)) / events.sum() + np.cov(np.array(v01)) / non_events.sum())
    return aucs, covariance
