"""`family: quasipoisson` and `family: quasibinomial`: the poisson and binomial estimates, with the dispersion
estimated by Pearson chi2 / df and the standard errors scaled by its square root (t tests, as R's summary.glm).

featpipe offers the quasi families rather than the negative binomial: NB2's shape likelihood needs ln Gamma(y + 1/alpha)
summed over the rows, a function PostgreSQL and Spark do not have, so it is no portable SQL sum; the quasi families
need only the Pearson chi2 every fit already sums in the engine.

Reference: statsmodels GLM with scale='X2' (Pearson chi2 / df_resid) and use_t=True.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from featpipe.glm import Glm


def overdispersed_counts(rows: int = 600, seed: int = 4):
    rng = np.random.default_rng(seed)
    x = np.column_stack([rng.normal(size=rows), rng.integers(0, 3, rows)]).astype(float)
    mean = np.exp(0.4 + x @ np.array([0.35, -0.2]))
    return x, rng.poisson(mean * rng.gamma(0.8, 1 / 0.8, rows)).astype(float)


def check_against(fit, reference):
    np.testing.assert_allclose(fit.estimates, reference.params, rtol=1e-9)
    np.testing.assert_allclose([c.inference.std_error for c in fit.coefficients], reference.bse, rtol=1e-8)
    np.testing.assert_allclose([c.inference.p_value for c in fit.coefficients], reference.pvalues, rtol=1e-6, atol=1e-300)
    assert fit.goodness_of_fit.dispersion == pytest.approx(reference.scale, rel=1e-9)
    assert fit.statistic_name == "t"
    # No likelihood (R's glm gives AIC NA for quasi families).
    assert fit.goodness_of_fit.log_likelihood is None and fit.goodness_of_fit.aic is None


def test_quasipoisson_scales_the_poisson_standard_errors_by_the_pearson_dispersion():
    x, y = overdispersed_counts()
    fit = Glm("quasipoisson").fit_arrays(x, y)
    # Reference: statsmodels GLM Poisson with scale='X2'.
    reference = sm.GLM(y, sm.add_constant(x), family=sm.families.Poisson()).fit(scale="X2", use_t=True, tol=1e-13)
    check_against(fit, reference)
    poisson = Glm("poisson").fit_arrays(x, y)
    assert fit.goodness_of_fit.dispersion > 1.5  # the data really are overdispersed
    assert not any("overdispersion" in warning for warning in fit.warnings)  # the quasi fit is the remedy
    assert any("overdispersion" in warning for warning in poisson.warnings)
    np.testing.assert_allclose(fit.estimates, poisson.estimates, rtol=1e-12)


def test_quasibinomial_on_proportions_with_trials_as_weights():
    rng = np.random.default_rng(6)
    rows = 300
    x = rng.normal(size=(rows, 2))
    trials = rng.integers(5, 40, rows).astype(float)
    p = 1 / (1 + np.exp(-(0.2 + x @ np.array([0.6, -0.4]))))
    successes = rng.binomial(trials.astype(int), rng.beta(4 * p, 4 * (1 - p)))
    share = successes / trials
    fit = Glm("quasibinomial").fit_arrays(x, share, weights=trials)
    # Reference: statsmodels GLM Binomial with the trials as var_weights and scale='X2'.
    reference = sm.GLM(share, sm.add_constant(x), family=sm.families.Binomial(), var_weights=trials).fit(
        scale="X2", use_t=True, tol=1e-13)
    check_against(fit, reference)


def test_quasi_targets_outside_their_domain_are_refused():
    x, y = overdispersed_counts(rows=50)
    with pytest.raises(Exception, match="a quasipoisson target is never negative"):
        Glm("quasipoisson").fit_arrays(x, y - 3.0)
    with pytest.raises(Exception, match="a quasibinomial target is a proportion from 0 to 1"):
        Glm("quasibinomial").fit_arrays(x, y + 1.0)
