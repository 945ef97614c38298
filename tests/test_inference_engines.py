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


# Sandwich standard errors: each family's fit with errors robust (HC1) and clustered on a column of 40
# groups, against statsmodels GLM on the same training rows: cov_type='HC0' times n / (n - p) (HC1 as
# MacKinnon and White define it, recalled from memory; statsmodels' GLM applies no correction for 'HC1',
# so its OLS HC1 is checked for gaussian too) and cov_type='cluster' (its default correction
# G/(G-1) (n-1)/(n-p)).
ROBUST_FAMILIES = ["binomial", "poisson", "gaussian", "gamma"]


def robust_reference(family: str, x, y, **fit):
    """statsmodels GLM with the expected information as the sandwich's bread (optim_hessian='eim', as featpipe
    takes X'WX): the same as its default for canonical links, and what gamma's log link needs to compare."""
    families = {**REFERENCE_FAMILIES, "binomial": lambda: sm.families.Binomial()}
    model = sm.GLM(y, sm.add_constant(x), family=families[family]())
    start = model.fit(tol=1e-13).params
    return model.fit(method="newton", optim_hessian="eim", start_params=start, tol=1e-14, **fit)


class Hc1:
    """statsmodels' HC0 results scaled to HC1: covariance times n / (n - p), Wald figures from it (normal)."""

    def __init__(self, hc0, factor: float):
        from scipy import stats

        self.params = hc0.params
        self._covariance = hc0.cov_params() * factor
        self.bse = np.sqrt(np.diag(self._covariance))
        self.tvalues = self.params / self.bse
        self.pvalues = 2 * stats.norm.sf(np.abs(self.tvalues))
        self._interval = np.column_stack([self.params - stats.norm.ppf(0.975) * self.bse, self.params + stats.norm.ppf(0.975) * self.bse])

    def cov_params(self):
        return self._covariance

    def conf_int(self):
        return self._interval


@pytest.mark.parametrize("family", ROBUST_FAMILIES)
def test_robust_errors_agree_with_statsmodels_on_every_engine(family, engine, tmp_path):
    x, y, _ = case_rows(family)
    clusters = np.arange(len(y)) % 40
    frame = design_frame({"a": x[:, 0], "b": x[:, 1]}, y, held_out=25)
    frame["_cluster"] = np.r_[clusters, np.zeros(25, dtype=int)].astype(np.int64)
    path = tmp_path / "design.parquet"
    frame.to_parquet(path, index=False)
    engine.load_file("design_m", path)
    layout = layout_of(frame.drop(columns="_cluster"))
    layout = type(layout)(layout.table, layout.key, layout.target, layout.terms, cluster="_cluster")
    robust = Glm(family, source="sql", errors="robust").fit(engine, layout)
    clustered = Glm(family, source="sql", errors="cluster").fit(engine, layout)
    plain = Glm(family, source="sql").fit(engine, layout)

    rows, parameters = len(y), 3
    hc0 = robust_reference(family, x, y, cov_type="HC0")  # Reference: statsmodels GLM cov_type='HC0'
    hc1 = Hc1(hc0, rows / (rows - parameters))
    if family == "gaussian":  # Reference: statsmodels OLS cov_type='HC1'
        ols = sm.OLS(y, sm.add_constant(x)).fit(cov_type="HC1")
        np.testing.assert_allclose([c.inference.std_error for c in robust.coefficients], ols.bse, rtol=1e-7)
    # Reference: statsmodels GLM cov_type='cluster' with its default small-sample correction
    by_cluster = robust_reference(family, x, y, cov_type="cluster", cov_kwds={"groups": clusters})
    for fit, reference in ((robust, hc1), (clustered, by_cluster)):
        np.testing.assert_allclose(fit.estimates, reference.params, rtol=1e-9)
        np.testing.assert_allclose(fit.covariance, reference.cov_params(), rtol=1e-7, atol=1e-12)
        np.testing.assert_allclose([c.inference.std_error for c in fit.coefficients], reference.bse, rtol=1e-7)
        np.testing.assert_allclose([c.inference.statistic for c in fit.coefficients], reference.tvalues, rtol=1e-7)
        np.testing.assert_allclose([c.inference.p_value for c in fit.coefficients], reference.pvalues, rtol=1e-6)
        np.testing.assert_allclose([c.inference.ci_low for c in fit.coefficients], reference.conf_int()[:, 0], rtol=1e-7)
        assert fit.statistic_name == "z"
    assert robust.robust_errors.kind == "HC1" and robust.robust_errors.clusters == rows
    assert clustered.robust_errors.kind == "cluster" and clustered.robust_errors.clusters == 40
    assert plain.robust_errors is None
    assert robust.convergence.passes_over_data == plain.convergence.passes_over_data + 1


def test_grouped_binomial_star98_agrees_on_every_engine(engine, tmp_path):
    from test_grouped_binomial import r_values, star98

    frame = star98()
    terms = [c for c in frame.columns if c not in ("district", "above", "pupils")]
    share = (frame["above"] / frame["pupils"]).to_numpy()
    design = design_frame({name: frame[name].to_numpy() for name in terms}, share, weight=frame["pupils"].to_numpy(float))
    path = tmp_path / "design.parquet"
    design.to_parquet(path, index=False)
    engine.load_file("design_m", path)
    fit = Glm("binomial", source="sql", trials=True).fit(engine, layout_of(design))
    in_memory = Glm("binomial", trials=True).fit_arrays(frame[terms].to_numpy(), share, weights=frame["pupils"].to_numpy(float))
    np.testing.assert_allclose(summary(fit), summary(in_memory), rtol=1e-9)
    # Reference: R's glm on star98, shipped with statsmodels (Star98): deviance and log-likelihood with the binomial constant.
    r, _, _ = r_values()
    assert fit.goodness_of_fit.deviance == pytest.approx(r.deviance, rel=1e-10)
    assert fit.goodness_of_fit.log_likelihood == pytest.approx(r.llf, rel=1e-10)
