"""Each family's unit deviance, split into the part of y alone (`saturated_deviance`, summed once per fit)
and the rest (`fitted_deviance`, summed per model and pass), adds up to statsmodels' unit deviance.

Reference: statsmodels' families (`resid_dev` squared is the unit deviance of each row; `deviance` the
prior-weighted sum, prior weights as its var_weights).
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from featpipe.glm.families import get_family

LOG = sm.families.links.Log()
CASES = {  # family: (statsmodels family, target values; a mix of the boundary values each family allows)
    "binomial": (sm.families.Binomial(), np.array([0.0, 1.0, 0.25, 0.5, 0.9, 1.0, 0.0, 0.125])),
    "poisson": (sm.families.Poisson(), np.array([0.0, 1.0, 2.0, 7.0, 0.0, 30.0, 3.0, 1.0])),
    "gaussian": (sm.families.Gaussian(), np.array([-2.5, 0.0, 1e6, 1e6 + 1, 3.25, -7.0, 0.5, 2.0])),
    "gamma": (sm.families.Gamma(LOG), np.array([0.1, 1.0, 2.5, 40.0, 0.01, 7.0, 1e4, 3.0])),
    "tweedie": (sm.families.Tweedie(LOG, var_power=1.5), np.array([0.0, 0.3, 1.0, 12.0, 0.0, 250.0, 2.0, 5.5])),
}


@pytest.mark.parametrize("name", list(CASES))
def test_the_saturated_and_fitted_parts_add_up_to_the_unit_deviance(name):
    reference, y = CASES[name]
    family = get_family(name, 1.5 if name == "tweedie" else None)
    eta = np.array([-1.2, 0.3, 2.0, -0.4, 1.1, 0.0, -3.0, 0.7])
    if name == "gaussian":
        eta = eta + 1e6  # a large mean: (y - mu)^2 is kept as one square, so nothing cancels
    mu = family.mean(family.clamp(eta))
    saturated = family.saturated_deviance(y)
    unit = family.fitted_deviance(y, eta, mu) + (0.0 if saturated is None else saturated)
    np.testing.assert_allclose(unit, reference.resid_dev(y, mu) ** 2, rtol=1e-12, atol=1e-12)
    weight = np.linspace(0.5, 4.0, len(y))
    assert weight @ unit == pytest.approx(reference.deviance(y, mu, var_weights=weight), rel=1e-13)


def test_a_binary_target_has_no_saturated_deviance_and_a_proportion_has():
    binomial = get_family("binomial")
    assert binomial.saturated_deviance(np.array([0.0, 1.0, 1.0, 0.0])) is None  # 0 for every row: nothing to sum
    # statsmodels: the deviance of a proportion fitted exactly is 0, so its saturated part cancels the fitted one
    share = np.array([0.25])
    eta = np.log(share / (1 - share))
    assert binomial.saturated_deviance(share)[0] == pytest.approx(-binomial.fitted_deviance(share, eta, share)[0], rel=1e-15)
    assert sm.families.Binomial().deviance(share, share) == pytest.approx(0.0, abs=1e-15)
    assert get_family("gaussian").saturated_deviance(share) is None

