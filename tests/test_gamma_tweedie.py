"""`family: gamma` and `family: tweedie` (with `power`), both with the log link, dispersion by Pearson chi2 / df.

References: statsmodels GLM with Gamma(Log()) and Tweedie(Log(), var_power) on generated data and on
statsmodels' scotland data (the R values statsmodels ships for scotland, `Scotvote`, are for the
canonical inverse link, not the log link, so they cannot check these fits; statsmodels' own log-link fit
of the same rows does). statsmodels runs with use_t=True, the t tests R's summary.glm reports.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import run_featpipe, write_project

from featpipe import api
from featpipe.fitted import read_fitted
from featpipe.glm import Glm
from featpipe.project import load_project


def severity_rows(rows: int = 500, seed: int = 3, zeros: float = 0.0):
    """Two terms; gamma amounts with shape 2 around exp(eta); a share `zeros` of them set to exactly 0."""
    rng = np.random.default_rng(seed)
    x = np.column_stack([rng.normal(size=rows), rng.integers(0, 4, rows)]).astype(float)
    mean = np.exp(6.0 + x @ np.array([0.3, -0.15]))
    y = rng.gamma(2.0, mean / 2.0)
    return x, np.where(rng.random(rows) < zeros, 0.0, y)


def reference_fit(x, y, family, **kwargs):
    return sm.GLM(y, sm.add_constant(x), family=family, **kwargs).fit(tol=1e-14, maxiter=200, use_t=True)


def assert_matches(fit, reference, likelihood: bool):
    np.testing.assert_allclose(fit.estimates, reference.params, rtol=1e-9, atol=1e-12)
    inference = [c.inference for c in fit.coefficients]
    np.testing.assert_allclose([i.std_error for i in inference], reference.bse, rtol=1e-8)
    np.testing.assert_allclose([i.p_value for i in inference], reference.pvalues, rtol=1e-6, atol=1e-300)
    np.testing.assert_allclose([i.ci_low for i in inference], reference.conf_int()[:, 0], rtol=1e-8, atol=1e-12)
    g = fit.goodness_of_fit
    assert g.deviance == pytest.approx(reference.deviance, rel=1e-10)
    assert g.null_deviance == pytest.approx(reference.null_deviance, rel=1e-9)
    assert g.pearson_chi2 == pytest.approx(reference.pearson_chi2, rel=1e-9)
    assert g.dispersion == pytest.approx(reference.scale, rel=1e-9)
    assert fit.statistic_name == "t"
    if likelihood:
        assert g.log_likelihood == pytest.approx(reference.llf, rel=1e-10)
        assert g.aic == pytest.approx(reference.aic, rel=1e-10)
        assert g.bic == pytest.approx(reference.bic_llf, rel=1e-10)
    else:
        assert g.log_likelihood is None and g.aic is None and g.bic is None


def test_gamma_log_link_matches_statsmodels_on_generated_data():
    x, y = severity_rows()
    # Reference: statsmodels GLM Gamma with the log link; llf at its Pearson scale.
    assert_matches(Glm("gamma").fit_arrays(x, y), reference_fit(x, y, sm.families.Gamma(sm.families.links.Log())), True)


def test_gamma_log_link_matches_statsmodels_on_the_scotland_data():
    data = sm.datasets.scotland.load_pandas()
    x, y = data.exog.to_numpy(float), data.endog.to_numpy(float)
    fit = Glm("gamma").fit_arrays(x, y, names=tuple(name.lower() for name in data.exog.columns))
    # Reference: statsmodels GLM Gamma(Log()) on its scotland data (32 council areas, 7 terms on very different scales).
    assert_matches(fit, reference_fit(x, y, sm.families.Gamma(sm.families.links.Log())), True)
    assert fit.rows.df_residual == 24  # as statsmodels' Scotvote results (R): df_resid 24


@pytest.mark.parametrize("power", [1.2, 1.5, 1.8])
def test_tweedie_log_link_matches_statsmodels_with_exact_zeros(power):
    x, y = severity_rows(zeros=0.4)
    assert (y == 0).sum() > 150
    # Reference: statsmodels GLM Tweedie(Log(), var_power); no log-likelihood (a series per row) is given.
    reference = reference_fit(x, y, sm.families.Tweedie(sm.families.links.Log(), var_power=power))
    assert_matches(Glm("tweedie", power=power).fit_arrays(x, y), reference, False)


def test_frequency_weighted_gamma_equals_the_rows_repeated_and_statsmodels_freq_weights():
    x, y = severity_rows(rows=120)
    counts = np.random.default_rng(8).integers(1, 5, len(y)).astype(float)
    fit = Glm("gamma", frequency_weights=True).fit_arrays(x, y, weights=counts)
    # Reference: statsmodels GLM with freq_weights.
    assert_matches(fit, reference_fit(x, y, sm.families.Gamma(sm.families.links.Log()), freq_weights=counts), True)


def test_the_family_refuses_targets_outside_its_domain():
    x, y = severity_rows(rows=60, zeros=0.2)
    with pytest.raises(Exception, match="a gamma target is a positive amount, but 'y' is zero or negative"):
        Glm("gamma").fit_arrays(x, y)
    with pytest.raises(Exception, match="a tweedie target is never negative"):
        Glm("tweedie", power=1.5).fit_arrays(x, y - 1.0)
    with pytest.raises(ValueError, match="power strictly between 1 and 2"):
        Glm("tweedie", power=2.0)


PROJECT = """\
name: claims
engine: {kind: duckdb, path: build/claims.duckdb}
inputs:
  claims:
    key: claim_id
    load: data/claims.csv
    columns: {claim_id: BIGINT, x1: DOUBLE, x2: DOUBLE, amount: DOUBLE}
"""


def claims_project(root, family: str, zeros: float = 0.0):
    x, y = severity_rows(zeros=zeros)
    write_project(root, {"featpipe.yaml": PROJECT, "terms/basket.sql": None, "specs/returns.yaml": None, "data/orders.csv": None,
                         "terms/claim.sql": "-- Twice x1.\nSELECT 2 * x1 AS doubled_x1 FROM claims\n",
                         "specs/severity.yaml": f"input: claims\ntarget: amount\n{family}\nterms: [doubled_x1, x2]\n"
                                                "holdout: {fraction: 0.3, salt: s}\nstep: {x2: 1}\n"})
    (root / "data").mkdir(exist_ok=True)
    pd.DataFrame({"claim_id": np.arange(len(y)), "x1": x[:, 0], "x2": x[:, 1], "amount": y}).to_csv(root / "data/claims.csv", index=False)


def test_a_gamma_spec_fits_reads_as_a_ratio_of_means_and_scores_in_sql(tmp_path):
    from featpipe.engines.statements import select_all
    from featpipe.sqlgen.common import holdout_rows, training_rows

    claims_project(tmp_path / "p", "family: gamma")
    project = load_project(tmp_path / "p")
    api.fit(project)
    fitted = read_fitted(project.fitted_path("severity"))  # validated on read
    assert (fitted.family, fitted.link, fitted.fit["statistic"]) == ("gamma", "log", "t")
    layout = api.check(project).models["severity"].layout
    with api.connect(project) as engine:
        train = engine.fetch_frame(select_all(layout.table).where(training_rows(layout)))
        held = engine.fetch_frame(select_all(layout.table).where(holdout_rows(layout)))
    # Reference: statsmodels GLM Gamma(Log()) on the training rows of the design table.
    reference = reference_fit(train[["doubled_x1", "x2"]].to_numpy(), train["amount"].to_numpy(),
                              sm.families.Gamma(sm.families.links.Log()))
    np.testing.assert_allclose([t.estimate for t in fitted.terms], reference.params, rtol=1e-9)
    assert fitted.fit["dispersion"] == pytest.approx(reference.scale, rel=1e-9)
    assert fitted.fit["aic"] == pytest.approx(reference.aic, rel=1e-9)
    x2 = fitted.term("x2")
    assert x2.effect.kind == "ratio of means" and x2.effect.value == pytest.approx(np.exp(reference.params[2]), rel=1e-9)
    assert "multiplies the expected amount by" in " ".join(x2.notes)
    # Holdout: the gamma deviance of the held-out rows at the written coefficients (numpy, by the definition).
    mu = np.exp(fitted.coefficients["(intercept)"] + held["doubled_x1"] * fitted.coefficients["doubled_x1"]
                + held["x2"] * fitted.coefficients["x2"])
    deviance = (2 * ((held["amount"] - mu) / mu - np.log(held["amount"] / mu))).sum()
    assert fitted.metrics["deviance"] == pytest.approx(deviance, rel=1e-9)
    assert fitted.metrics["mean_predicted"] == pytest.approx(mu.mean(), rel=1e-9)
    # The scoring query predicts the same means as the formula, on every row of the input.
    result = run_featpipe("score", "severity", "--table", "claims", "--into", "severity_scores", cwd=tmp_path / "p")
    assert result.returncode == 0, result.stdout + result.stderr
    with api.connect(project) as engine:
        scores = engine.fetch_frame(select_all("severity_scores")).sort_values("claim_id")
    rows = pd.read_csv(tmp_path / "p/data/claims.csv")
    expected = np.exp(fitted.coefficients["(intercept)"] + 2 * rows["x1"] * fitted.coefficients["doubled_x1"]
                      + rows["x2"] * fitted.coefficients["x2"])
    np.testing.assert_allclose(scores["prediction"], expected, rtol=1e-12)


def test_a_tweedie_spec_needs_its_power_and_writes_it_into_the_fitted_file(tmp_path):
    claims_project(tmp_path / "p", "family: tweedie", zeros=0.3)
    result = run_featpipe("check", cwd=tmp_path / "p")
    assert result.returncode == 1 and "Traceback" not in result.stdout + result.stderr
    assert "specs/severity.yaml:3:9: family tweedie needs power: a number strictly between 1 (poisson) and 2 (gamma)" in result.stdout + result.stderr
    spec = tmp_path / "p/specs/severity.yaml"
    spec.write_text(spec.read_text().replace("family: tweedie", "family: tweedie\npower: 2.5"))
    assert "specs/severity.yaml:4:8: family tweedie needs power" in run_featpipe("check", cwd=tmp_path / "p").stderr
    spec.write_text(spec.read_text().replace("power: 2.5", "power: 1.6"))
    assert run_featpipe("fit", cwd=tmp_path / "p").returncode == 0
    fitted = read_fitted(tmp_path / "p/fitted/severity.yaml")
    assert fitted.fit["power"] == 1.6 and fitted.depends_on["power"] == 1.6
    assert fitted.fit["aic"] is None and fitted.fit["log_likelihood"] is None
    assert "infinite series" in fitted.fit["conventions"]["aic"]
    # A different power is a different model: the fit goes stale, and says what changed.
    spec.write_text(spec.read_text().replace("power: 1.6", "power: 1.4"))
    stale = run_featpipe("score", "severity", "--table", "claims", "--into", "s", cwd=tmp_path / "p")
    assert stale.returncode == 1 and "power" in stale.stdout + stale.stderr


def test_power_is_refused_for_another_family_and_a_gamma_target_with_zeros_stops_the_fit(tmp_path):
    claims_project(tmp_path / "p", "family: gamma\npower: 1.5", zeros=0.1)
    result = run_featpipe("check", cwd=tmp_path / "p")
    assert result.returncode == 1
    assert "specs/severity.yaml:4:1: power is the tweedie variance power; family gamma takes none, remove it" in result.stdout + result.stderr
    spec = tmp_path / "p/specs/severity.yaml"
    spec.write_text(spec.read_text().replace("power: 1.5\n", ""))
    result = run_featpipe("fit", cwd=tmp_path / "p")
    assert result.returncode == 1 and "Traceback" not in result.stdout + result.stderr
    assert "a gamma target is a positive amount" in result.stdout + result.stderr
    assert not (tmp_path / "p/fitted/severity.yaml").exists()


def test_a_hand_edited_power_is_refused(tmp_path):
    claims_project(tmp_path / "p", "family: tweedie\npower: 1.5", zeros=0.3)
    assert run_featpipe("fit", cwd=tmp_path / "p").returncode == 0
    path = tmp_path / "p/fitted/severity.yaml"
    path.write_text(path.read_text().replace("  power: 1.5\n", "  power: 1.7\n", 1))
    result = run_featpipe("explain", "severity", cwd=tmp_path / "p")
    assert result.returncode == 1
    assert "fit.power must be given for a tweedie fit only, equal to depends_on.power" in result.stdout + result.stderr



def test_the_report_of_a_tweedie_model_shows_its_reading_and_deviance_residuals(tmp_path):
    from featpipe.fitted.report import write_report

    claims_project(tmp_path / "p", "family: tweedie\npower: 1.5", zeros=0.3)
    project = load_project(tmp_path / "p")
    api.fit(project)
    text = write_report(project, "severity").read_text()
    assert "Tweedie regression (log link) of amount on 2 terms" in text
    assert "Deviance residuals by decile" in text and "ratio of means" in text
