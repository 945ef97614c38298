"""Pearson chi2 for every fit, computed in the engine like X'WX, and the overdispersion reading.

Reference: statsmodels GLM (`pearson_chi2`, `df_resid`) on the same rows, prior weights as its
`var_weights`; SQLite (tests/sqlite_engine.py's shape, here the minimal design reader of
test_glm_reference) as an engine with very different typing.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from test_glm_reference import SQLiteDesign, design_frame, duckdb_design, layout_of

from featpipe.glm import Glm
from featpipe.glm.dispersion import OVERDISPERSED

FAMILIES = {"binomial": sm.families.Binomial, "poisson": sm.families.Poisson, "gaussian": sm.families.Gaussian}


def counts(family: str, rows: int = 800, seed: int = 3, overdispersed: bool = False):
    """Two terms, prior weights; poisson counts drawn with gamma-mixed means when `overdispersed`."""
    rng = np.random.default_rng(seed)
    x = np.column_stack([rng.normal(size=rows), rng.uniform(0, 4, rows)])
    weight = rng.uniform(0.5, 2.0, rows)
    eta = 0.3 + x @ np.array([0.4, -0.2])
    if family == "binomial":
        y = (rng.random(rows) < 1 / (1 + np.exp(-eta))).astype(float)
    elif family == "poisson":
        mean = np.exp(eta) * (rng.gamma(0.5, 2.0, rows) if overdispersed else 1.0)  # gamma mixing: negative binomial
        y = rng.poisson(mean).astype(float)
    else:
        y = eta + rng.normal(size=rows)
    return x, y, weight


def reference(family: str, x, y, weight=None):
    return sm.GLM(y, sm.add_constant(x), family=FAMILIES[family](), var_weights=weight).fit(tol=1e-13)


@pytest.mark.parametrize("family", ["binomial", "poisson", "gaussian"])
def test_pearson_chi2_equals_statsmodels_on_arrays_duckdb_and_sqlite(family, tmp_path):
    x, y, weight = counts(family)
    expected = reference(family, x, y, weight).pearson_chi2
    frame = design_frame({"a": x[:, 0], "b": x[:, 1]}, y, weight=weight, held_out=30)
    engine, layout = duckdb_design(frame, tmp_path)
    fits = [Glm(family).fit_arrays(x, y, weights=weight), Glm(family, source="stream").fit(engine, layout),
            Glm(family, source="sql").fit(engine, layout), Glm(family).fit(SQLiteDesign(frame), layout_of(frame))]
    # The sums are those of the last IRLS pass: when the last step was below 1e-15 in deviance (coefficients
    # settled to about 3e-8) no extra pass is spent, so Pearson chi2, unlike the deviance, moves by ~1e-8.
    for fit in fits:
        assert fit.goodness_of_fit.pearson_chi2 == pytest.approx(expected, rel=1e-7)
    for fit in fits[1:]:
        assert fit.goodness_of_fit.pearson_chi2 == pytest.approx(fits[0].goodness_of_fit.pearson_chi2, rel=1e-9)


def test_overdispersed_counts_are_named_with_their_pearson_ratio_and_the_remedies():
    x, y, _ = counts("poisson", overdispersed=True)
    fit = Glm("poisson").fit_arrays(x, y)
    ratio = reference("poisson", x, y).pearson_chi2 / reference("poisson", x, y).df_resid  # statsmodels
    assert ratio > OVERDISPERSED
    (warning,) = [w for w in fit.warnings if "Pearson" in w]
    assert warning.startswith(f"Pearson chi2 / df is {ratio:.2f}, above 1.5 (a common screen): the counts vary more "
                              "than the poisson family allows (overdispersion), so the standard errors are too small")
    assert f"read each standard error as about {ratio ** 0.5:.2f} times larger (the quasi-poisson correction" in warning
    assert "refit with family: quasipoisson, which scales them so" in warning


@pytest.mark.parametrize("family", ["poisson", "binomial"])
def test_counts_the_family_fits_and_0_1_targets_get_no_overdispersion_warning(family):
    x, y, _ = counts(family)
    fit = Glm(family).fit_arrays(x, y)
    assert not any("Pearson" in w for w in fit.warnings)
