"""Problems a fit meets are explained, naming the terms and saying what to do.

The data are built so that each problem holds by construction (a term equal to a combination of
others, a term that predicts the target perfectly, ...); the limit of 10 events per term is common
practice.
"""

from __future__ import annotations

import numpy as np
import pytest
from test_glm_reference import design_frame, duckdb_design

from featpipe.errors import FeatpipeError
from featpipe.glm import Glm
from featpipe.project import Penalty

ROWS = 200


@pytest.fixture
def rng():
    return np.random.default_rng(21)


def fit_error(tmp_path, terms, y, family="binomial", source="auto", **frame) -> str:
    engine, layout = duckdb_design(design_frame(terms, y, **frame), tmp_path)
    with pytest.raises(FeatpipeError) as raised:
        Glm(family, source=source).fit(engine, layout)
    return str(raised.value)


@pytest.mark.parametrize("source", ["stream", "sql"])
def test_complete_separation_names_the_runaway_term(tmp_path, rng, source):
    score, noise = rng.normal(size=ROWS), rng.normal(size=ROWS)
    y = (score > 0).astype(float)
    message = fit_error(tmp_path, {"score": score, "noise": noise}, y, source=source)
    assert message.startswith("design table design_m: the estimates of 'score' (estimate per sd ")
    assert "training rows have fitted probabilities within 1e-10 of 0 or 1)" in message
    assert "'noise'" not in message
    assert "complete or quasi-complete separation: they predict the target perfectly on some rows" in message
    assert "Add an l2 penalty to the model spec (penalty: {l2: 0.01})" in message


def test_quasi_complete_separation_and_the_penalty_that_fixes_it(tmp_path, rng):
    flag = (rng.uniform(size=ROWS) < 0.3).astype(float)
    noise = rng.normal(size=ROWS)
    y = np.where(flag == 1, 1.0, (rng.uniform(size=ROWS) < 0.3).astype(float))  # flag = 1: always an event
    engine, layout = duckdb_design(design_frame({"flag": flag, "noise": noise}, y), tmp_path)
    with pytest.raises(FeatpipeError, match=r"the estimates of 'flag' \(estimate per sd [0-9.]+, z 0\.00\) run away"):
        Glm("binomial").fit(engine, layout)
    penalized = Glm("binomial", Penalty(l2=0.01)).fit(engine, layout)
    assert penalized.convergence.converged and np.isfinite(penalized.estimates).all()
    assert not any("run away" in warning for warning in penalized.warnings)


def test_poisson_group_with_only_zero_counts(tmp_path, rng):
    group = (rng.uniform(size=ROWS) < 0.25).astype(float)
    counts = np.where(group == 1, 0.0, rng.poisson(3.0, size=ROWS))
    message = fit_error(tmp_path, {"group": group, "noise": rng.normal(size=ROWS)}, counts, "poisson")
    assert "the estimates of 'group' (estimate per sd -" in message
    assert "they single out rows whose counts are all 0" in message


def test_aliased_terms_are_named_with_the_combination_they_equal(tmp_path, rng):
    a, b = rng.normal(size=ROWS), rng.normal(size=ROWS)
    y = (rng.uniform(size=ROWS) < 0.4).astype(float)
    message = fit_error(tmp_path, {"a": a, "b": b, "c": a + 2 * b - 3}, y)
    assert message == (
        "design table design_m: term(s) 'c' are linear combinations of other terms on the training rows, so their "
        "coefficients are not identified: 'c' = 1 * 'a' + 2 * 'b' - 3. Remove 'c' from the model's terms "
        "(or one of the terms each is built from)"
    )


def test_indicators_that_add_up_to_the_intercept(tmp_path, rng):
    level = rng.integers(0, 3, size=ROWS)
    terms = {name: (level == index).astype(float) for index, name in enumerate(("low", "mid", "high"))}
    message = fit_error(tmp_path, terms, (rng.uniform(size=ROWS) < 0.4).astype(float))
    assert "'high' = -1 * 'low' - 1 * 'mid' + 1. Remove 'high'" in message


def test_term_constant_on_the_training_rows(tmp_path, rng):
    frame = design_frame({"x": rng.normal(size=ROWS), "k": np.full(ROWS, 3.0)}, (rng.uniform(size=ROWS) < 0.4) * 1.0)
    frame.loc[:9, "_holdout"] = True
    frame.loc[:9, "k"] = 5.0  # varies only on held-out rows
    engine, layout = duckdb_design(frame, tmp_path)
    with pytest.raises(FeatpipeError) as raised:
        Glm("binomial").fit(engine, layout)
    assert str(raised.value) == (
        "design table design_m: term(s) constant on all 190 training rows ('k' = 3), so their coefficients cannot "
        "be told apart from the intercept; remove them from the model's terms or check their definitions"
    )


def test_non_convergence_is_a_warning_on_the_fit(tmp_path, rng):
    x = rng.normal(size=ROWS)
    y = (rng.uniform(size=ROWS) < 1 / (1 + np.exp(-2 * x))).astype(float)
    engine, layout = duckdb_design(design_frame({"x": x}, y), tmp_path)
    fit = Glm("binomial", max_iter=2).fit(engine, layout)
    assert not fit.convergence.converged
    assert fit.convergence.iterations == 2
    assert fit.warnings[0].startswith(
        "IRLS did not converge within max_iter=2 iterations: the last step still changed the deviance by "
    )
    assert fit.warnings[0].endswith("(relative); the estimates are not final. Raise max_iter, rescale terms "
                                    "with extreme values, or add an l2 penalty")


def test_binomial_target_must_be_zero_or_one(tmp_path, rng):
    y = (rng.uniform(size=ROWS) < 0.4).astype(float)
    y[17] = 2.0
    message = fit_error(tmp_path, {"x": rng.normal(size=ROWS)}, y)
    assert message == (
        "design table design_m: a binomial target must be 0 or 1, but 'y' has other values on 1 training rows "
        "(training values range from 0 to 2); recode it as 0/1 or a boolean, or choose another family"
    )


def test_poisson_counts_must_be_whole_and_not_negative(tmp_path, rng):
    counts = rng.poisson(2.0, size=ROWS).astype(float)
    counts[[3, 4]] = -1.0
    message = fit_error(tmp_path, {"x": rng.normal(size=ROWS)}, counts, "poisson")
    assert message.startswith("design table design_m: a poisson target is a count, but 'y' is negative on 2 training rows")
    counts[[3, 4]] = 1.5
    message = fit_error(tmp_path, {"x": rng.normal(size=ROWS)}, counts, "poisson")
    assert "'y' is not a whole number on 2 training rows" in message
    assert "put the exposure in `offset: LN(exposure)` instead of dividing by it" in message


def test_weights_must_be_positive(tmp_path, rng):
    weight = np.ones(ROWS)
    weight[0] = 0.0
    message = fit_error(tmp_path, {"x": rng.normal(size=ROWS)}, (rng.uniform(size=ROWS) < 0.4) * 1.0, weight=weight)
    assert "weight '_weight' is zero or negative on 1 training rows" in message


def test_no_training_rows(tmp_path, rng):
    frame = design_frame({"x": rng.normal(size=20)}, np.zeros(20))
    frame["_holdout"] = True
    engine, layout = duckdb_design(frame, tmp_path)
    with pytest.raises(FeatpipeError, match="design table design_m has no training rows: every row is held out"):
        Glm("binomial").fit(engine, layout)


def test_few_events_per_term_is_a_warning(tmp_path, rng):
    y = np.zeros(ROWS)
    y[rng.choice(ROWS, 12, replace=False)] = 1.0  # 12 events for 3 terms
    engine, layout = duckdb_design(design_frame({f"x{j}": rng.normal(size=ROWS) for j in range(3)}, y), tmp_path)
    fit = Glm("binomial").fit(engine, layout)
    assert fit.convergence.converged
    assert fit.warnings == (
        "only 12 events (rows of the rarer outcome) for 3 terms (4.0 per term); with fewer than 10 per term "
        "(common practice) estimates are unstable and look better than they are: remove terms, add data, or add "
        "an l2 penalty",
    )
