"""Penalized fits checked against scikit-learn at the same penalty.

featpipe minimizes deviance / (2 N) + l2 / 2 ||b||^2 + l1 ||b||_1 over the coefficients of the terms
standardized with their training mean and population sd, intercept unpenalized (N = sum of weights).
Each check standardizes the same way with scikit-learn's StandardScaler and converts the penalty into
the reference estimator's own parameter, stated beside it.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.linear_model import (
    ElasticNet,
    Lasso,
    LogisticRegression,
    PoissonRegressor,
    Ridge,
)
from sklearn.preprocessing import StandardScaler
from test_glm_reference import design_frame, duckdb_design

from featpipe.glm import Glm
from featpipe.project import Penalty


def case(family: str, rows: int = 400, seed: int = 4):
    rng = np.random.default_rng(seed)
    base = rng.normal(size=(rows, 5))
    x = np.column_stack([base[:, 0], 3 + 2 * base[:, 1] + base[:, 0], 100 * base[:, 2], base[:, 3], base[:, 4] > 0])
    x = x.astype(float)
    eta = 0.3 + x @ np.array([0.8, -0.3, 0.004, 0.0, 0.2])
    if family == "binomial":
        y = (rng.uniform(size=rows) < 1 / (1 + np.exp(-eta))).astype(float)
    elif family == "poisson":
        y = rng.poisson(np.exp(0.5 * eta)).astype(float)
    else:
        y = eta + rng.normal(size=rows)
    return x, y


def original_scale(scaler: StandardScaler, intercept: float, coef: np.ndarray) -> np.ndarray:
    """Coefficients on the standardized terms back on the terms' own scale, intercept first."""
    slopes = coef / scaler.scale_
    return np.r_[intercept - slopes @ scaler.mean_, slopes]


def test_ridge_matches_scikit_learn_ridge_with_weights():
    x, y = case("gaussian")
    weights = np.random.default_rng(1).uniform(0.5, 2.0, size=len(y))
    l2 = 0.05
    fit = Glm("gaussian", Penalty(l2=l2)).fit_arrays(x, y, weights=weights)
    scaler = StandardScaler().fit(x)
    # scikit-learn Ridge minimizes sum w (y - Xb)^2 + alpha ||b||^2, so alpha = l2 * sum(w).
    reference = Ridge(alpha=l2 * weights.sum(), solver="cholesky").fit(scaler.transform(x), y, sample_weight=weights)
    np.testing.assert_allclose(fit.estimates, original_scale(scaler, reference.intercept_, reference.coef_), rtol=1e-9)


@pytest.mark.parametrize(("l2", "l1"), [(0.0, 0.05), (0.1, 0.02)])
def test_lasso_and_elastic_net_match_scikit_learn(l2, l1):
    x, y = case("gaussian")
    fit = Glm("gaussian", Penalty(l2=l2, l1=l1)).fit_arrays(x, y)
    scaler = StandardScaler().fit(x)
    # scikit-learn: 1/(2n) ||y - Xb||^2 + alpha * l1_ratio ||b||_1 + alpha (1 - l1_ratio) / 2 ||b||^2.
    if l2 == 0:
        reference = Lasso(alpha=l1, tol=1e-14, max_iter=1_000_000)
    else:
        reference = ElasticNet(alpha=l1 + l2, l1_ratio=l1 / (l1 + l2), tol=1e-14, max_iter=1_000_000)
    reference.fit(scaler.transform(x), y)
    expected = original_scale(scaler, reference.intercept_, reference.coef_)
    np.testing.assert_allclose(fit.estimates, expected, rtol=1e-6, atol=1e-9)
    assert [c == 0 for c in fit.estimates[1:]] == [c == 0 for c in reference.coef_]
    if l2 == 0:
        assert 0.0 in fit.estimates[1:]  # the lasso drops at least one term at this penalty


def test_logistic_l2_matches_scikit_learn_on_duckdb(tmp_path):
    x, y = case("binomial")
    l2 = 0.02
    names = [f"t{j}" for j in range(x.shape[1])]
    engine, layout = duckdb_design(design_frame(dict(zip(names, x.T)), y), tmp_path)
    fit = Glm("binomial", Penalty(l2=l2)).fit(engine, layout)
    scaler = StandardScaler().fit(x)
    # scikit-learn LogisticRegression minimizes C * sum(log loss) + ||b||^2 / 2, and the deviance is
    # twice the log loss, so C = 1 / (n * l2).
    reference = LogisticRegression(C=1 / (len(y) * l2), solver="newton-cholesky", tol=1e-12, max_iter=1000)
    reference.fit(scaler.transform(x), y)
    expected = original_scale(scaler, reference.intercept_[0], reference.coef_[0])
    np.testing.assert_allclose(fit.estimates, expected, rtol=1e-7)
    # A warm start on the first 100 rows: IRLS then works on that sample's scaling, the penalty stays
    # defined on the training sd.
    warm = Glm("binomial", Penalty(l2=l2), sample_rows=100).fit(engine, layout)
    np.testing.assert_allclose(warm.estimates, expected, rtol=1e-7)
    assert fit.penalized
    assert all(coefficient.inference is None for coefficient in fit.coefficients)
    assert any("plain Wald inference does not hold for penalized estimates" in w for w in fit.warnings)


def test_logistic_l1_matches_scikit_learn(tmp_path):
    x, y = case("binomial", seed=9)
    l1 = 0.03
    names = [f"t{j}" for j in range(x.shape[1])]
    engine, layout = duckdb_design(design_frame(dict(zip(names, x.T)), y), tmp_path)
    fit = Glm("binomial", Penalty(l1=l1), sample_rows=150, source="sql").fit(engine, layout)
    scaler = StandardScaler().fit(x)
    # scikit-learn: C * sum(log loss) + ||b||_1 (l1_ratio=1), so C = 1 / (n * l1).
    reference = LogisticRegression(C=1 / (len(y) * l1), l1_ratio=1.0, solver="saga", tol=1e-12, max_iter=200_000)
    reference.fit(scaler.transform(x), y)
    expected = original_scale(scaler, reference.intercept_[0], reference.coef_[0])
    np.testing.assert_allclose(fit.estimates, expected, rtol=1e-5, atol=1e-7)
    assert [c == 0 for c in fit.estimates[1:]] == [abs(c) < 1e-9 for c in reference.coef_[0]]


def test_poisson_l2_matches_scikit_learn_poisson_regressor():
    x, y = case("poisson")
    l2 = 0.01
    fit = Glm("poisson", Penalty(l2=l2)).fit_arrays(x, y)
    scaler = StandardScaler().fit(x)
    # scikit-learn PoissonRegressor: 1/(2n) sum(deviance) + alpha / 2 ||b||^2, so alpha = l2.
    reference = PoissonRegressor(alpha=l2, solver="newton-cholesky", tol=1e-12, max_iter=1000).fit(scaler.transform(x), y)
    np.testing.assert_allclose(fit.estimates, original_scale(scaler, reference.intercept_, reference.coef_), rtol=1e-7)
