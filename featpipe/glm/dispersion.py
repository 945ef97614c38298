"""Pearson's chi2 over its residual degrees of freedom, and what it says about the counts.

For poisson counts (and binomial successes out of several trials) the model fixes the variance at
the mean (or at n mu (1 - mu)); Pearson chi2 / df near 1 agrees, and well above 1 the counts vary
more than the model allows (overdispersion), so its standard errors are too small by about the square
root of the ratio. A 0/1 target cannot show overdispersion: its Pearson chi2 / df says nothing about
it, so no reading is drawn from it.
"""

from __future__ import annotations

import math

OVERDISPERSED = 1.5  # common practice as a screen for Pearson chi2 / df


def estimated_dispersion(family, deviance: float, pearson_chi2: float, df_residual: float) -> float:
    """The dispersion the standard errors use: 1 for binomial and poisson; deviance / df for gaussian (the
    residual mean square, equal to Pearson's); Pearson chi2 / df for gamma, tweedie and the quasi families
    (as R's summary.glm and statsmodels' default scale)."""
    if not family.estimates_dispersion:
        return 1.0
    if family.name == "gaussian":
        return deviance / df_residual
    return pearson_ratio(pearson_chi2, df_residual)


def pearson_ratio(pearson_chi2: float, df_residual: float) -> float:
    """Pearson chi2 / df (NaN without residual degrees of freedom)."""
    return pearson_chi2 / df_residual if df_residual > 0 else math.nan


def overdispersion_warning(family: str, ratio: float, binary: bool) -> str | None:
    """The warning a poisson fit (or a binomial fit of successes out of trials) gets when Pearson
    chi2 / df is above `OVERDISPERSED`; None otherwise."""
    if family not in ("poisson", "binomial") or (family == "binomial" and binary) or not ratio > OVERDISPERSED:
        return None
    return (f"Pearson chi2 / df is {ratio:.2f}, above {OVERDISPERSED:g} (a common screen): the "
            f"{'counts' if family == 'poisson' else 'successes'} vary more than the {family} family allows "
            "(overdispersion), so the standard errors are too small and the p-values too optimistic; read each "
            f"standard error as about {math.sqrt(ratio):.2f} times larger (the quasi-{family} correction, the square "
            f"root of the ratio): refit with family: quasi{family}, which scales them so, or with errors: robust "
            "(sandwich standard errors, which do not assume the family's variance), or add the terms that explain the "
            "extra variation")
