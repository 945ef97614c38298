"""Frequency weights: a row with weight w stands for w identical rows.

The sums of a fit (deviance, X'WX, score, Pearson chi2) are the same for frequency and variance
weights; what differs is what counts as a row. With frequency weights the number of observations is
the weight sum, so the residual degrees of freedom, the dispersion, BIC's ln(n), the events per term
and the gaussian log-likelihood (no sum of ln w) are those of the repeated rows.
"""

from __future__ import annotations

from dataclasses import replace

from ..errors import FeatpipeError
from ..sqlgen.statistics import TrainingProfile


def as_repeated_rows(profile: TrainingProfile, where: str) -> TrainingProfile:
    """The profile of the rows the weights stand for: rows and target sum weighted, no ln w term.

    Frequency weights count rows, so their sum must be a whole number (`where` names the data)."""
    if not float(profile.weight_sum).is_integer():
        raise FeatpipeError(
            f"{where}: frequency weights count identical rows, but they add up to {profile.weight_sum:g}, not a whole "
            "number; use whole counts, or weights: {column: ..., kind: variance} for precision weights"
        )
    return replace(profile, rows=profile.weight_sum, target_sum=profile.weighted_target_sum, log_weight_sum=0.0)
