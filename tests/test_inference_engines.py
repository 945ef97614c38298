"""The new statistics of a fit where the data is: Pearson chi2, frequency weights and the effective
degrees of freedom of a penalized fit give the same figures on DuckDB, PostgreSQL and Spark, to 1e-9.

Reference: the DuckDB in-memory fit of the same rows (itself checked against statsmodels in
test_dispersion, test_frequency_weights and test_honest_readings) and statsmodels GLM directly.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from test_glm_reference import design_frame, layout_of

from featpipe.glm import Glm
from featpipe.project import Penalty

CASES = {
    "pearson chi2 (poisson)": dict(family="poisson"),
    "frequency weights (gaussian)": dict(family="gaussian", frequency_weights=True),
    "effective df (binomial, l2)": dict(family="binomial", penalty=Penalty(l2=0.02)),
    "gamma (log link)": dict(family="gamma"),
    "tweedie (log link, power 1.5)": dict(family="tweedie", power=1.5),
    "quasipoisson": dict(family="quasipoisson"),
}
# statsmodels' family for each case (log links for gamma and tweedie)
REFERENCE_FAMILIES = {
    "poisson": lambda: sm.families.Poisson(), "quasipoisson": lambda: sm.families.Poisson(), "gaussian": lambda: sm.families.Gaussian(),
    "gamma": lambda: sm.families.Gamma(sm.families.links.Log()),
    "tweedie": lambda: sm.families.Tweedie(sm.families.links.Log(), var_power=1.5),
}


def case_rows(family: str, rows: int = 400, seed: int = 9):
    rng = np.random.default_rng(seed)
    x = np.column_stack([rng.normal(size=rows), rng.integers(0, 4, rows)]).astype(float)
    counts = rng.integers(1, 6, rows).astype(float)
    eta = 0.2 + x @ np.array([0.5, -0.3])
    if family == "binomial":
        y = (rng.random(rows) < 1 / (1 + np.exp(-eta))).astype(float)
    elif family in ("poisson", "quasipoisson"):
        y = rng.poisson(np.exp(eta) * rng.gamma(1.0, 1.0, rows)).astype(float)
    elif family in ("gamma", "tweedie"):
        y = rng.gamma(2.0, np.exp(eta) / 2.0) * (rng.random(rows) < (0.6 if family == "tweedie" else 1.0))
    else:
        y = eta + rng.normal(size=rows)
    return x, y, counts


def summary(fit) -> list[float]:
    g = fit.goodness_of_fit
    errors = [c.inference.std_error for c in fit.coefficients if c.inference is not None]
    likelihood = [g.log_likelihood, g.aic, g.bic] if g.log_likelihood is not None else []
    return [*fit.estimates, *errors, g.deviance, *likelihood, g.dispersion, g.pearson_chi2, g.effective_df, fit.rows.n]


@pytest.fixture(params=["duckdb", "postgres", "spark"])
def engine(request):
    if request.param == "duckdb":
        from featpipe.engines.duckdb import DuckDBEngine

        engine = DuckDBEngine()
        yield engine
        engine.close()
    else:
        yield request.getfixturevalue(f"{request.param}_engine")


@pytest.mark.parametrize("case", list(CASES))
def test_new_statistics_agree_on_every_engine(case, engine, tmp_path):
    settings = dict(CASES[case])
    family = settings.pop("family")
    x, y, counts = case_rows(family)
    weighted = settings.get("frequency_weights", False)
    frame = design_frame({"a": x[:, 0], "b": x[:, 1]}, y, weight=counts if weighted else None, held_out=25)
    path = tmp_path / "design.parquet"
    frame.to_parquet(path, index=False)
    engine.load_file("design_m", path)
    fit = Glm(family, source="sql", **settings).fit(engine, layout_of(frame))
    in_memory = Glm(family, **settings).fit_arrays(x, y, weights=counts if weighted else None)
    np.testing.assert_allclose(summary(fit), summary(in_memory), rtol=1e-9)
    if "penalty" not in settings:
        # Reference: statsmodels GLM on the same rows (freq_weights for frequency weights).
        reference = sm.GLM(y, sm.add_constant(x), family=REFERENCE_FAMILIES[family](),
                           freq_weights=counts if weighted else None).fit(tol=1e-13, scale="X2" if family.startswith("quasi") else None)
        assert fit.goodness_of_fit.pearson_chi2 == pytest.approx(reference.pearson_chi2, rel=1e-7)
        np.testing.assert_allclose([c.inference.std_error for c in fit.coefficients], reference.bse, rtol=1e-7)
