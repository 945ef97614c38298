"""`weights: {column: c, kind: frequency}`: a row stands for c identical rows.

References: the same rows physically repeated and fitted without weights (the definition of a
frequency weight), and statsmodels GLM with `freq_weights`.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import run_featpipe, write_project

from featpipe import api
from featpipe.fitted import read_fitted
from featpipe.glm import Glm
from featpipe.project import load_project

FAMILIES = {"binomial": sm.families.Binomial, "poisson": sm.families.Poisson, "gaussian": sm.families.Gaussian}


def grouped(family: str, seed: int = 5):
    """Rows compressed with GROUP BY: each distinct (x1, x2, y) once, with its count."""
    rng = np.random.default_rng(seed)
    rows = 3000
    x = np.column_stack([rng.integers(0, 5, rows), rng.integers(0, 3, rows)]).astype(float)
    eta = -0.5 + x @ np.array([0.3, -0.4])
    if family == "binomial":
        y = (rng.random(rows) < 1 / (1 + np.exp(-eta))).astype(float)
    elif family == "poisson":
        y = rng.poisson(np.exp(eta)).astype(float)
    else:
        y = np.round(eta + rng.normal(size=rows), 0)
    frame = pd.DataFrame({"x1": x[:, 0], "x2": x[:, 1], "y": y}).value_counts().rename("n").reset_index()
    return frame[["x1", "x2"]].to_numpy(), frame["y"].to_numpy(), frame["n"].to_numpy(float)


def figures(fit):
    g = fit.goodness_of_fit
    errors = [c.inference.std_error for c in fit.coefficients]
    return [*fit.estimates, *errors, g.deviance, g.log_likelihood, g.aic, g.bic, g.dispersion, fit.rows.df_residual]


@pytest.mark.parametrize("family", ["gaussian", "binomial", "poisson"])
def test_frequency_weights_equal_the_rows_repeated_and_statsmodels_freq_weights(family):
    x, y, counts = grouped(family)
    assert len(y) < 200 < counts.sum()  # a real compression
    compressed = Glm(family, frequency_weights=True).fit_arrays(x, y, weights=counts)
    repeat = np.repeat(np.arange(len(y)), counts.astype(int))
    repeated = Glm(family).fit_arrays(x[repeat], y[repeat])
    np.testing.assert_allclose(figures(compressed), figures(repeated), rtol=1e-9)
    assert compressed.rows.n == counts.sum()
    # Reference: statsmodels GLM with freq_weights (its nobs is the weight sum).
    reference = sm.GLM(y, sm.add_constant(x), family=FAMILIES[family](), freq_weights=counts).fit(tol=1e-13)
    np.testing.assert_allclose(compressed.estimates, reference.params, rtol=1e-8)
    np.testing.assert_allclose([c.inference.std_error for c in compressed.coefficients], reference.bse, rtol=1e-7)
    assert compressed.goodness_of_fit.log_likelihood == pytest.approx(reference.llf, rel=1e-9)
    assert compressed.goodness_of_fit.bic == pytest.approx(reference.bic_llf, rel=1e-9)
    assert compressed.rows.df_residual == reference.df_resid
    if family == "gaussian":
        assert compressed.goodness_of_fit.dispersion == pytest.approx(reference.scale, rel=1e-9)
        # Read as variance weights, the same file gets standard errors several times too large.
        variance = Glm(family).fit_arrays(x, y, weights=counts)
        assert variance.coefficients[1].inference.std_error > 2 * compressed.coefficients[1].inference.std_error


PROJECT = """\
name: cells
engine: {kind: duckdb, path: build/cells.duckdb}
inputs:
  cells:
    key: cell_id
    load: data/cells.csv
    columns: {cell_id: BIGINT, x1: DOUBLE, x2: DOUBLE, y: DOUBLE, n: BIGINT}
"""


def cells_project(root, weights: str):
    x, y, counts = grouped("binomial")
    write_project(root, {"featpipe.yaml": PROJECT, "terms/basket.sql": None, "specs/returns.yaml": None,
                         "data/orders.csv": None, "specs/default.yaml": f"input: cells\ntarget: y\nfamily: binomial\n"
                         f"terms: [x1, x2]\nholdout: {{fraction: 0.0}}\nweights: {weights}\n"})
    (root / "data").mkdir(exist_ok=True)
    pd.DataFrame({"cell_id": np.arange(len(y)), "x1": x[:, 0], "x2": x[:, 1], "y": y, "n": counts.astype(int)}).to_csv(
        root / "data/cells.csv", index=False)
    return x, y, counts


def test_a_spec_with_frequency_weights_fits_on_the_weight_sum_and_says_so_in_the_file(tmp_path):
    x, y, counts = cells_project(tmp_path / "p", "{column: n, kind: frequency}")
    project = load_project(tmp_path / "p")
    api.fit(project)
    fitted = read_fitted(project.fitted_path("default"))
    assert fitted.weights == {"column": "n", "kind": "frequency"}
    assert fitted.fit["observations"] == counts.sum() and fitted.rows["train"] == len(y)
    # Reference: statsmodels GLM with freq_weights; BIC with ln of the weight sum.
    reference = sm.GLM(y, sm.add_constant(x), family=sm.families.Binomial(), freq_weights=counts).fit(tol=1e-13)
    assert fitted.fit["bic"] == pytest.approx(reference.bic_llf, rel=1e-9)
    assert fitted.fit["bic"] == pytest.approx(-2 * reference.llf + 3 * math.log(counts.sum()), rel=1e-9)
    # A bare column name keeps its meaning, a variance weight, and the same fingerprint as before.
    (tmp_path / "p/specs/default.yaml").write_text((tmp_path / "p/specs/default.yaml").read_text()
                                                   .replace("{column: n, kind: frequency}", "{column: n, kind: variance}"))
    variance = api.check(load_project(tmp_path / "p")).models["default"]
    assert variance.spec.weights == "n" and variance.dependencies["weights"] == "n"


def test_an_unknown_weight_kind_is_refused_with_its_line(tmp_path):
    cells_project(tmp_path / "p", "{column: n, kind: count}")
    result = run_featpipe("check", cwd=tmp_path / "p")
    assert result.returncode == 1 and "Traceback" not in result.stderr + result.stdout
    assert "specs/default.yaml:6:" in result.stdout + result.stderr
    assert "weights kind must be frequency (a row stands for that many identical rows) or variance" in result.stdout + result.stderr


def test_holdout_metrics_count_the_rows_the_weights_stand_for(tmp_path):
    from sklearn.metrics import accuracy_score, brier_score_loss, log_loss, roc_auc_score

    from featpipe.engines.statements import select_all
    from featpipe.sqlgen.common import holdout_rows

    cells_project(tmp_path / "p", "{column: n, kind: frequency}")
    spec = tmp_path / "p/specs/default.yaml"
    spec.write_text(spec.read_text().replace("fraction: 0.0", "fraction: 0.4"))
    project = load_project(tmp_path / "p")
    api.fit(project)
    fitted = read_fitted(project.fitted_path("default"))
    layout = api.check(project).models["default"].layout
    with api.connect(project) as engine:
        held = engine.fetch_frame(select_all(layout.table).where(holdout_rows(layout)))
    eta = fitted.coefficients["(intercept)"] + held["x1"] * fitted.coefficients["x1"] + held["x2"] * fitted.coefficients["x2"]
    p, y, n = 1 / (1 + np.exp(-eta)), held["y"], held[layout.weight]
    # Reference: scikit-learn metrics with the counts as sample weights (the rows repeated).
    metrics = fitted.metrics
    assert metrics["rows"] == n.sum() and metrics["events"] == (n * y).sum()
    assert metrics["auc"] == pytest.approx(roc_auc_score(y, p, sample_weight=n), rel=1e-12)
    assert metrics["log_loss"] == pytest.approx(log_loss(y, p, sample_weight=n), rel=1e-9)
    assert metrics["brier"] == pytest.approx(brier_score_loss(y, p, sample_weight=n), rel=1e-9)
    assert metrics["accuracy"] == pytest.approx(accuracy_score(y, p >= 0.5, sample_weight=n), rel=1e-12)
    assert sum(decile["rows"] for decile in metrics["calibration"]) == n.sum()


def test_frequency_weights_that_do_not_add_up_to_whole_rows_are_refused():
    x, y, counts = grouped("poisson")
    with pytest.raises(Exception, match="frequency weights count identical rows, but they add up to"):
        Glm("poisson", frequency_weights=True).fit_arrays(x, y, weights=counts + 0.25)


def test_evaluate_and_the_fold_metrics_count_the_rows_the_weights_stand_for(tmp_path):
    from sklearn.metrics import log_loss, roc_auc_score

    x, y, counts = cells_project(tmp_path / "p", "{column: n, kind: frequency}")
    spec = tmp_path / "p/specs/default.yaml"
    spec.write_text(spec.read_text() + "folds: 3\n")
    project = load_project(tmp_path / "p")
    api.fit(project)
    fitted = read_fitted(project.fitted_path("default"))
    # Each fold's metrics are those of its rows repeated: together the folds hold every repeated row.
    assert sum(fold["metrics"]["rows"] for fold in fitted.crossval["per_fold"]) == counts.sum()
    evaluation, _ = api.evaluate(project, "default", "cells")
    eta = fitted.coefficients["(intercept)"] + x[:, 0] * fitted.coefficients["x1"] + x[:, 1] * fitted.coefficients["x2"]
    p = 1 / (1 + np.exp(-eta))
    # Reference: scikit-learn metrics with the counts as sample weights (the rows repeated).
    assert evaluation.metrics["rows"] == counts.sum() and evaluation.metrics["events"] == (counts * y).sum()
    assert evaluation.metrics["auc"] == pytest.approx(roc_auc_score(y, p, sample_weight=counts), rel=1e-9)
    assert evaluation.metrics["log_loss"] == pytest.approx(log_loss(y, p, sample_weight=counts), rel=1e-9)
