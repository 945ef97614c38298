"""Grouped binomial: `target: successes` with `trials: n` in the spec fits successes out of trials (R's
glm with cbind(successes, failures)).

Reference: statsmodels' star98 data (math scores of 303 California school districts: pupils above and below
the national median) and R's glm results on it that statsmodels ships in
statsmodels.genmod.tests.results.results_glm.Star98 (estimates, standard errors, deviance, log-likelihood
with the binomial constant, R's AIC, Pearson chi2); R fitted the intercept last. Holdout metrics against
scikit-learn with each trial a 0/1 row (successes and failures as sample weights).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import run_featpipe, write_project
from statsmodels.genmod.tests.results.results_glm import Star98

from featpipe import api
from featpipe.fitted import read_fitted
from featpipe.glm import Glm
from featpipe.project import load_project


def star98() -> pd.DataFrame:
    data = sm.datasets.star98.load_pandas()
    frame = data.exog.rename(columns=str.lower)
    frame.insert(0, "district", np.arange(len(frame)))
    frame["above"] = data.endog["NABOVE"].astype(int)
    frame["pupils"] = (data.endog["NABOVE"] + data.endog["NBELOW"]).astype(int)
    return frame


def r_values():
    """R's figures with the intercept moved first, as featpipe lists it."""
    r = Star98()
    return r, np.r_[r.params[-1], r.params[:-1]], np.r_[r.bse[-1], r.bse[:-1]]


def test_star98_arrays_give_rs_glm():
    frame = star98()
    terms = [c for c in frame.columns if c not in ("district", "above", "pupils")]
    fit = Glm("binomial", trials=True).fit_arrays(frame[terms].to_numpy(), frame["above"] / frame["pupils"], weights=frame["pupils"])
    r, params, bse = r_values()
    # Reference: R's glm on star98 (shipped with statsmodels); R converged to its own tolerance, to about 1e-8.
    np.testing.assert_allclose(fit.estimates, params, rtol=1e-6)
    np.testing.assert_allclose([c.inference.std_error for c in fit.coefficients], bse, rtol=1e-6)
    g = fit.goodness_of_fit
    assert g.deviance == pytest.approx(r.deviance, rel=1e-10)
    assert g.log_likelihood == pytest.approx(r.llf, rel=1e-10)  # with the binomial constant ln C(n, k)
    assert g.aic == pytest.approx(r.aic_R, rel=1e-10)
    assert g.pearson_chi2 == pytest.approx(r.pearson_chi2, rel=1e-6)
    # Reference: statsmodels GLM on the (successes, failures) pairs, converged tighter than R.
    reference = sm.GLM(np.column_stack([frame["above"], frame["pupils"] - frame["above"]]), sm.add_constant(frame[terms].to_numpy()),
                       family=sm.families.Binomial()).fit(tol=1e-13)
    np.testing.assert_allclose(fit.estimates, reference.params, rtol=1e-9)
    np.testing.assert_allclose([c.inference.std_error for c in fit.coefficients], reference.bse, rtol=1e-8)
    assert g.null_deviance == pytest.approx(reference.null_deviance, rel=1e-10)


def star98_project(root, extra: str = "", frame: pd.DataFrame | None = None, holdout: float = 0.0) -> pd.DataFrame:
    frame = star98() if frame is None else frame
    terms = [c for c in frame.columns if c not in ("district", "above", "pupils")]
    columns = ", ".join(f"{name}: {'BIGINT' if name in ('district', 'above', 'pupils') else 'DOUBLE'}" for name in frame.columns)
    write_project(root, {
        "featpipe.yaml": f"name: schools\nengine: {{kind: duckdb, path: build/schools.duckdb}}\ninputs:\n  districts:\n"
                         f"    key: district\n    load: data/districts.csv\n    columns: {{{columns}}}\n",
        "terms/basket.sql": None, "specs/returns.yaml": None, "data/orders.csv": None,
        "specs/scores.yaml": f"input: districts\ntarget: above\ntrials: pupils\nfamily: binomial\nterms: [{', '.join(terms)}]\n"
                             f"holdout: {{fraction: {holdout}, salt: s1}}\n{extra}",
    })
    (root / "data").mkdir(exist_ok=True)
    frame.to_csv(root / "data/districts.csv", index=False)
    return frame


def test_a_spec_with_trials_fits_star98_as_r_does(tmp_path):
    star98_project(tmp_path / "p")
    project = load_project(tmp_path / "p")
    api.fit(project)
    fitted = read_fitted(project.fitted_path("scores"))
    r, params, bse = r_values()
    # Reference: R's glm on star98 (shipped with statsmodels).
    np.testing.assert_allclose([term.estimate for term in fitted.terms], params, rtol=1e-6)
    np.testing.assert_allclose([term.std_error for term in fitted.terms], bse, rtol=1e-6)
    assert fitted.fit["log_likelihood"] == pytest.approx(r.llf, rel=1e-10)
    assert fitted.fit["deviance"] == pytest.approx(r.deviance, rel=1e-10)
    assert fitted.depends_on["trials"] == "pupils"
    assert any("overdispersion" in warning for warning in fitted.warnings)  # Pearson chi2 / df is 13.4 in R's figures


def test_holdout_metrics_read_each_trial_as_a_row(tmp_path):
    from sklearn.metrics import brier_score_loss, log_loss, roc_auc_score

    from featpipe.engines.statements import select_all
    from featpipe.sqlgen.common import holdout_rows

    star98_project(tmp_path / "p", holdout=0.3)
    project = load_project(tmp_path / "p")
    api.fit(project)
    fitted = read_fitted(project.fitted_path("scores"))
    layout = api.check(project).models["scores"].layout
    with api.connect(project) as engine:
        held = engine.fetch_frame(select_all(layout.table).where(holdout_rows(layout)))
    eta = fitted.coefficients["(intercept)"] + sum(held[name] * fitted.coefficients[name] for name in layout.terms)
    p = 1 / (1 + np.exp(-eta))
    successes = np.round(held[layout.target] * held[layout.weight])
    failures = held[layout.weight] - successes
    y, weight, score = np.r_[np.ones(len(p)), np.zeros(len(p))], np.r_[successes, failures], np.r_[p, p]
    # Reference: scikit-learn metrics over the trials, successes and failures as sample weights.
    metrics = fitted.metrics
    assert metrics["rows"] == held[layout.weight].sum() and metrics["events"] == successes.sum()
    assert metrics["auc"] == pytest.approx(roc_auc_score(y, score, sample_weight=weight), rel=1e-12)
    assert metrics["log_loss"] == pytest.approx(log_loss(y, score, sample_weight=weight), rel=1e-9)
    assert metrics["brier"] == pytest.approx(brier_score_loss(y, score, sample_weight=weight), rel=1e-9)


@pytest.mark.parametrize(("change", "message"), [
    ("more", "successes 'above' exceed the trials on 1 training rows"),
    ("fraction", "the trials must be a whole number of at least 1, but is 10.5 on 1 training rows"),
])
def test_counts_that_cannot_be_trials_are_refused(tmp_path, change, message):
    frame = star98()
    if change == "more":
        frame.loc[3, "above"] = frame.loc[3, "pupils"] + 1
    else:
        frame["pupils"] = frame["pupils"].astype(float)
        frame.loc[3, "pupils"], frame.loc[3, "above"] = 10.5, 4
    star98_project(tmp_path / "p", frame=frame)
    if change == "fraction":  # a DOUBLE trials column is allowed, its values are checked
        yaml = tmp_path / "p/featpipe.yaml"
        yaml.write_text(yaml.read_text().replace("pupils: BIGINT", "pupils: DOUBLE"))
    result = run_featpipe("fit", cwd=tmp_path / "p")
    assert result.returncode == 1 and "Traceback" not in result.stdout + result.stderr
    assert message in result.stdout + result.stderr
    assert not (tmp_path / "p/fitted/scores.yaml").exists()


@pytest.mark.parametrize(("edit", "message"), [
    (("family: binomial", "family: poisson"), "specs/scores.yaml:3:9: trials count binomial successes out of trials; family is poisson"),
    (("trials: pupils", "trials: classes"), "specs/scores.yaml:3:9: trials must name the column of input 'districts'"),
])
def test_trials_the_spec_cannot_use_are_refused_with_their_line(tmp_path, edit, message):
    star98_project(tmp_path / "p")
    spec = tmp_path / "p/specs/scores.yaml"
    spec.write_text(spec.read_text().replace(*edit))
    result = run_featpipe("check", cwd=tmp_path / "p")
    assert result.returncode == 1 and "Traceback" not in result.stdout + result.stderr
    assert message in result.stdout + result.stderr
