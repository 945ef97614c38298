"""Frequency weights: a row with weight w stands for w identical rows.

The sums of a fit (deviance, X'WX, score, Pearson chi2) are the same for frequency and variance
weights; what differs is what counts as a row. With frequency weights the number of observations is
the weight sum, so the residual degrees of freedom, the dispersion, BIC's ln(n), the events per term
and the gaussian log-likelihood (no sum of ln w) are those of the repeated rows.
"""

from __future__ import annotations

from dataclasses import replace

from ..sqlgen.statistics import TrainingProfile


def as_repeated_rows(profile: TrainingProfile) -> TrainingProfile:
    """The profile of the rows the weights stand for: rows and target sum weighted, no ln w term."""
    return replace(profile, rows=profile.weight_sum, target_sum=profile.weighted_target_sum, log_weight_sum=0.0)
