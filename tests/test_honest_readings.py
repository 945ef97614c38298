"""Readings that say no more than the numbers do: penalized fits (effective degrees of freedom, no
intervals in notes, report or explain), the VIF labelled as the weighted form it is, effects per one
training standard deviation when no step is given (never an infinite effect), conventions in the file.

References: the hat matrix built row by row with numpy (its trace is the effective degrees of freedom),
statsmodels' GLM (coefficient covariance, for the weighted VIF), pandas (the training sd).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import run_featpipe, write_project

from featpipe import api
from featpipe.engines.statements import select_all
from featpipe.fitted import read_fitted
from featpipe.fitted.report import write_report
from featpipe.glm import Glm
from featpipe.project import Penalty, load_project
from featpipe.sqlgen.common import training_rows

PROJECT = """\
name: policies
engine: {kind: duckdb, path: build/policies.duckdb}
inputs:
  policies:
    key: policy_id
    load: data/policies.csv
    columns: {policy_id: BIGINT, speed: DOUBLE, distance: DOUBLE, tiny: DOUBLE, urban: BIGINT, claimed: BIGINT}
"""
TERMS = """\
SELECT
  -- Average speed, strongly correlated with distance.
  speed AS avg_speed,
  distance AS yearly_distance,
  -- A figure on a tiny scale.
  tiny AS tiny_share,
  CASE WHEN urban = 1 THEN TRUE ELSE FALSE END AS in_town
FROM policies
"""


def policies(rows: int = 1500, seed: int = 11) -> pd.DataFrame:
    """Invented policies: two strongly correlated terms, one on a scale of 1e-6, an indicator."""
    rng = np.random.default_rng(seed)
    speed = rng.normal(size=rows)
    distance = speed + 0.15 * rng.normal(size=rows)
    tiny = rng.normal(size=rows) * 1e-6
    urban = rng.integers(0, 2, rows)
    eta = -0.4 + 1.5 * speed - 0.7 * distance + 3e5 * tiny + 0.3 * urban
    claimed = (rng.random(rows) < 1 / (1 + np.exp(-eta))).astype(int)
    return pd.DataFrame({"policy_id": np.arange(1, rows + 1), "speed": speed, "distance": distance, "tiny": tiny,
                         "urban": urban, "claimed": claimed})


def policy_project(root, spec: str):
    write_project(root, {"featpipe.yaml": PROJECT, "terms/basket.sql": None, "terms/driving.sql": TERMS,
                         "specs/returns.yaml": None, "specs/claims.yaml": spec, "data/orders.csv": None})
    (root / "data").mkdir(exist_ok=True)
    policies().to_csv(root / "data/policies.csv", index=False, float_format="%.17g")
    return load_project(root)


SPEC = """\
input: policies
target: claimed
family: binomial
terms: [avg_speed, yearly_distance, tiny_share, in_town]
"""
PENALIZED = SPEC + "penalty: {l2: 0.05}\n"


def hat_trace(design: np.ndarray, weights: np.ndarray, penalty: np.ndarray) -> float:
    """tr(W^1/2 X (X'WX + P)^-1 X' W^1/2), built as the n x n hat matrix itself."""
    rooted = design * np.sqrt(weights)[:, None]
    hat = rooted @ np.linalg.inv(rooted.T @ rooted + penalty) @ rooted.T
    return float(np.trace(hat))


@pytest.mark.parametrize("family", ["gaussian", "binomial"])
def test_a_penalized_fit_counts_its_effective_degrees_of_freedom_in_aic_and_bic(family):
    data = policies()
    X = data[["speed", "distance", "tiny", "urban"]].to_numpy(float)
    y = data["claimed"].to_numpy(float) if family == "binomial" else data["speed"].to_numpy() * 2 + data["urban"]
    l2 = 0.05
    fit = Glm(family, Penalty(l2=l2)).fit_arrays(X, y)
    # Reference: the hat matrix on the rows, terms standardized by their population sd as the penalty
    # is defined (featpipe.glm.penalty; N = rows), W the IRLS weights at the fitted coefficients.
    rows = len(y)
    standardized = np.c_[np.ones(rows), (X - X.mean(axis=0)) / X.std(axis=0)]
    eta = np.c_[np.ones(rows), X] @ np.array(fit.estimates)
    weights = np.ones(rows) if family == "gaussian" else (mu := 1 / (1 + np.exp(-eta))) * (1 - mu)
    edf = hat_trace(standardized, weights, np.diag([0.0] + [rows * l2] * 4))
    assert fit.goodness_of_fit.effective_df == pytest.approx(edf, rel=1e-9)
    assert edf < 5  # shrinking spends fewer than the five coefficients
    llf = fit.goodness_of_fit.log_likelihood
    assert fit.goodness_of_fit.aic == pytest.approx(-2 * llf + 2 * edf, rel=1e-12)
    assert fit.goodness_of_fit.bic == pytest.approx(-2 * llf + edf * math.log(rows), rel=1e-12)
    plain = Glm(family).fit_arrays(X, y)
    assert plain.goodness_of_fit.effective_df == 5.0


def test_penalized_notes_say_the_coefficients_shrink_together_with_no_interval(tmp_path):
    project = policy_project(tmp_path / "p", PENALIZED)
    api.fit(project)
    fitted = read_fitted(project.fitted_path("claims"))
    for term in fitted.model_terms:
        assert not any("shrunk toward zero" in note for note in term.notes)
        assert any("shrinks the coefficients together" in note and "no valid 95% interval" in note for note in term.notes)
        assert term.effect.low is None and term.p_value is None
    assert fitted.fit["effective_df"] < 5
    assert "effective degrees of freedom" in fitted.fit["conventions"]["aic"]


def test_the_report_and_explain_of_a_penalized_fit_show_estimates_without_intervals(tmp_path):
    project = policy_project(tmp_path / "p", PENALIZED)
    api.fit(project)
    page = write_report(project, "claims").read_text()
    assert "terms have a 95% interval that excludes no effect" not in page
    assert "A penalized fit has no 95% intervals" in page and "estimates only" in page
    shown = run_featpipe("explain", "avg_speed", cwd=project.root)
    assert shown.returncode == 0, shown.stderr
    line = next(line for line in shown.stdout.splitlines() if line.startswith("model claims:"))
    assert line.endswith("no interval or p-value (a penalized fit)") and ", p " not in line


def test_the_vif_is_the_weighted_form_and_says_so(tmp_path):
    project = policy_project(tmp_path / "p", SPEC)
    api.fit(project)
    fitted = read_fitted(project.fitted_path("claims"))
    layout = api.check(project).models["claims"].layout
    with api.connect(project) as engine:
        rows = engine.fetch_frame(select_all(layout.table).where(training_rows(layout))).sort_values(layout.key)
    design = sm.add_constant(rows[list(layout.terms)].to_numpy(float))
    # Reference: statsmodels GLM; the weighted VIF of term j is cov_jj times (cov^-1)_jj over the term block
    # of the coefficient covariance (the generalized VIF of one column, as R's car::vif computes it; recalled
    # from memory).
    covariance = sm.GLM(rows["claimed"].to_numpy(float), design, family=sm.families.Binomial()).fit(tol=1e-13).cov_params()[1:, 1:]
    expected = np.diag(covariance) * np.diag(np.linalg.inv(covariance))
    np.testing.assert_allclose([t.vif for t in fitted.model_terms], expected, rtol=1e-6)
    speed = fitted.term("avg_speed")
    assert speed.vif > 10
    assert any(note.startswith(f"weighted VIF {speed.vif:.1f} is above 10: collinearity with other terms multiplies the "
                               f"variance of the estimate by {speed.vif:.1f}") for note in speed.notes)
    assert "IRLS-weighted" in fitted.fit["conventions"]["vif"]


def test_without_a_step_an_effect_is_per_one_training_sd_and_never_infinite(tmp_path):
    project = policy_project(tmp_path / "p", SPEC + "step: {yearly_distance: 1.0e+6}\n")
    api.fit(project)
    fitted = read_fitted(project.fitted_path("claims"))
    layout = api.check(project).models["claims"].layout
    with api.connect(project) as engine:
        rows = engine.fetch_frame(select_all(layout.table).where(training_rows(layout)))
    tiny = fitted.term("tiny_share")
    sd = rows["tiny_share"].std()  # pandas: the sample sd of the training rows
    assert tiny.effect.basis == "sd" and tiny.effect.step == pytest.approx(sd, rel=1e-9)
    assert tiny.effect.value == pytest.approx(math.exp(tiny.estimate * sd), rel=1e-9) and 1 < tiny.effect.value < 10
    assert tiny.notes[0].startswith(f"each increase of one training standard deviation ({sd:g}) in tiny share multiplies "
                                    "the odds of claimed by")
    town = fitted.term("in_town")
    assert (town.effect.step, town.effect.basis) == (1.0, "indicator")
    # A step of a million sds: the ratio overflows (or underflows to 0); the reading says so instead of
    # printing inf or 0.
    distance = fitted.term("yearly_distance")
    assert distance.effect.basis == "step" and (math.isinf(distance.effect.value) or distance.effect.value == 0.0)
    assert "inf" not in distance.notes[0] and "0.00" not in distance.notes[0]
    assert "give a smaller step" in distance.notes[0]


def test_the_fitted_file_states_its_conventions(tmp_path):
    project = policy_project(tmp_path / "p", SPEC)
    api.fit(project)
    conventions = read_fitted(project.fitted_path("claims")).fit["conventions"]
    assert set(conventions) == {"aic", "bic", "log_likelihood", "p_values", "pearson_dispersion", "vif", "step"}
    assert "unlike R" in conventions["aic"] or "R's glm counts it" in conventions["aic"]
    assert "log-likelihood form" in conventions["bic"] and "normal distribution" in conventions["p_values"]
