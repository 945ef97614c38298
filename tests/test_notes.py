"""Interpretation notes: the exact sentences for each kind of note, and the effect arithmetic.

Effect values are checked against hand computation (shown in the comments) and Python's math.exp.
"""

from __future__ import annotations

import math

import pytest

from featpipe.fitted import Effect
from featpipe.fitted.notes import effect, figure, model_reading, term_notes, words

# A firm-age term of a logistic default model: b = -0.0685, 95% interval -0.09 to -0.047, step 5 years.
# By hand: exp(5 x -0.0685) = exp(-0.3425) = exp(-0.3) x exp(-0.0425) = 0.740818 x 0.958390 = 0.709993;
# exp(5 x -0.09) = exp(-0.45) = exp(-0.5) x exp(0.05) = 0.606531 x 1.051271 = 0.637628;
# exp(5 x -0.047) = exp(-0.235) = exp(-0.25) x exp(0.015) = 0.778801 x 1.015113 = 0.790571.
FIRM_AGE = dict(name="firm_age_years", family="binomial", target="default", estimate=-0.0685,
                ci_low=-0.09, ci_high=-0.047, p_value=2e-9, step=5.0)
FIRM_AGE_READING = ("each 5 more years of firm age multiplies the odds of default by 0.71 "
                    "(95% interval 0.64 to 0.79), other terms held fixed")


def test_effect_is_an_odds_ratio_per_step_for_a_logistic_model():
    result = effect("binomial", -0.0685, -0.09, -0.047, 5.0)
    assert result.kind == "odds ratio" and result.step == 5.0
    assert (result.value, result.low, result.high) == pytest.approx((0.709993, 0.637628, 0.790571), abs=1e-6)
    assert result.value == math.exp(5.0 * -0.0685)


def test_effect_kinds_by_family_and_missing_intervals():
    # Poisson: rate ratio exp(0.2) = 1.221403 (by hand: 1 + 0.2 + 0.02 + 0.001333 + 0.0000667 + ...).
    assert effect("poisson", 0.2, None, None) == Effect("rate ratio", 1.0, math.exp(0.2), None, None)
    assert effect("poisson", 0.2, None, None).value == pytest.approx(1.221403, abs=1e-6)
    # Gaussian: difference step x b = 2 x 1.25 = 2.5, interval 2 x 0.5 = 1.0 to 2 x 2.0 = 4.0.
    assert effect("gaussian", 1.25, 0.5, 2.0, 2.0) == Effect("difference", 2.0, 2.5, 1.0, 4.0)
    # A negative step reverses the bounds; they are kept ordered low to high.
    assert effect("gaussian", 1.25, 0.5, 2.0, -2.0) == Effect("difference", -2.0, -2.5, -4.0, -1.0)
    with pytest.raises(ValueError, match="unknown family 'negative_binomial'"):
        effect("negative_binomial", 1.0, None, None)


def test_reading_with_a_unit_phrase():
    assert term_notes(**FIRM_AGE, unit_phrase="years of firm age") == (FIRM_AGE_READING,)


def test_readings_name_the_term_in_words_without_a_unit_phrase():
    assert term_notes(**FIRM_AGE)[0] == (
        "each increase of 5 in firm age years multiplies the odds of default by 0.71 "
        "(95% interval 0.64 to 0.79), other terms held fixed"
    )
    # Step 1, gaussian: a signed difference in the target's units (1.2, interval 0.8 to 1.6).
    assert term_notes(name="items", family="gaussian", target="order_value", estimate=1.2, ci_low=0.8,
                      ci_high=1.6) == (
        "each one-unit increase in items changes order value by +1.20 (95% interval +0.80 to +1.60), "
        "other terms held fixed",
    )
    # An indicator is read as 1 rather than 0, whatever the step; poisson: exp(0.2) = 1.22, no interval.
    assert term_notes(name="urban_depot", family="poisson", target="claims", estimate=0.2, ci_low=None,
                      ci_high=None, step=5.0, kind="boolean") == (
        "urban depot (1 rather than 0) multiplies the expected count by 1.22, other terms held fixed",
    )


def test_expected_sign():
    assert term_notes(**FIRM_AGE, expect="negative")[1] == "expected negative: met"
    assert term_notes(**FIRM_AGE, expect="positive")[1] == (
        "expected positive but the estimate is negative: review the term or the data")
    zero = {**FIRM_AGE, "estimate": 0.0, "ci_low": None, "ci_high": None}
    assert term_notes(**zero, expect="positive")[1] == "expected positive but the estimate is zero: review the term or the data"


def test_an_interval_that_includes_no_effect():
    crossing = {**FIRM_AGE, "ci_low": -0.2, "ci_high": 0.01, "p_value": 0.083}
    assert term_notes(**crossing)[1] == (
        "the interval includes no effect (an odds ratio of 1), p = 0.083: the data do not show a clear effect of this term")
    gaussian = {**crossing, "family": "gaussian", "p_value": 0.0004}
    assert term_notes(**gaussian)[1] == (
        "the interval includes no effect (a difference of 0), p < 0.001: the data do not show a clear effect of this term")
    poisson = {**crossing, "family": "poisson", "p_value": None}
    assert term_notes(**poisson)[1] == (
        "the interval includes no effect (a rate ratio of 1): the data do not show a clear effect of this term")


def test_collinearity_above_five_and_ten():
    # VIF thresholds 5 and 10 are common practice; at exactly 5 nothing is said.
    assert len(term_notes(**FIRM_AGE, vif=5.0)) == 1
    assert term_notes(**FIRM_AGE, vif=6.24)[1] == (
        "weighted VIF 6.2 is above 5: collinearity with other terms multiplies the variance of the estimate by 6.2 and "
        "widens the interval")
    assert term_notes(**FIRM_AGE, vif=14.0)[1] == (
        "weighted VIF 14.0 is above 10: collinearity with other terms multiplies the variance of the estimate by 14.0, "
        "making it unstable and its interval wide")


def test_terms_to_read_together():
    assert term_notes(**FIRM_AGE, related=["young_firm"])[1] == (
        "read together with young_firm: its effect cannot be held fixed while it changes")
    assert term_notes(**FIRM_AGE, related=["payment_to_revenue", "young_firm", "firm_age_years", "young_firm"])[1] == (
        "read together with payment_to_revenue and young_firm: its effect cannot be held fixed while they change")
    assert term_notes(**FIRM_AGE, related=["a_term", "b_term", "c_term"])[1].startswith(
        "read together with a_term, b_term and c_term:")


PENALIZED = ("fitted with a penalty, which shrinks the coefficients together rather than each toward zero (with "
             "correlated terms an estimate may grow or change sign): there is no valid 95% interval or p-value")


def test_penalty_caveat():
    no_interval = {**FIRM_AGE, "ci_low": None, "ci_high": None}
    assert term_notes(**no_interval, penalized=True)[1] == PENALIZED


def test_all_notes_in_reading_order_with_the_human_note_first_and_unchanged():
    human = "Credit policy treats firms under two years as start-ups;  keep it."
    notes = term_notes(**{**FIRM_AGE, "ci_high": 0.02, "p_value": 0.21}, unit_phrase="years of firm age",
                       expect="negative", vif=11.5, related=["young_firm"], human_note=human, penalized=True)
    assert notes == (
        human,
        "each 5 more years of firm age multiplies the odds of default by 0.71 (95% interval 0.64 to 1.11), "
        "other terms held fixed",  # exp(5 x 0.02) = exp(0.1) = 1.105171 by hand
        "expected negative: met",
        PENALIZED,
        "the interval includes no effect (an odds ratio of 1), p = 0.21: the data do not show a clear effect of this term",
        "weighted VIF 11.5 is above 10: collinearity with other terms multiplies the variance of the estimate by 11.5, "
        "making it unstable and its interval wide",
        "read together with young_firm: its effect cannot be held fixed while it changes",
    )


def test_words_and_figures():
    assert words("firm_age_years") == "firm age years"
    assert words("_leading__double_") == "leading double"
    assert [figure(v) for v in (0.70999, 12.345, 1234.5, 0.0123, 0.0)] == ["0.71", "12.35", "1,234", "0.012", "0.00"]
    assert figure(-1.2, signed=True) == "-1.20" and figure(1.2, signed=True) == "+1.20"
    assert figure(math.inf) == "inf"


def test_model_reading():
    binomial = {"rows": 3000, "accuracy": 0.812, "baseline_accuracy": 0.75, "auc": 0.7913}
    assert model_reading(family="binomial", target="defaulted_12m", terms=4, train_rows=7000, metrics=binomial) == (
        "Logistic regression of defaulted 12m on 4 terms, fitted on 7,000 training rows. On 3,000 held-out rows it "
        "classifies 81.2% correctly at threshold 0.5, against 75.0% for always predicting the majority class. "
        "Its AUC is 0.79."
    )
    weak = {**binomial, "accuracy": 0.75, "auc": None}
    assert model_reading(family="binomial", target="churned", terms=1, train_rows=90, metrics=weak, threshold=0.3) == (
        "Logistic regression of churned on 1 term, fitted on 90 training rows. On 3,000 held-out rows it classifies "
        "75.0% correctly at threshold 0.3, against 75.0% for always predicting the majority class, so at this "
        "threshold it is no better than the baseline."
    )
    poisson = {"rows": 244, "mean_absolute_error": 0.434, "mean_predicted": 0.333, "mean_observed": 0.287}
    assert model_reading(family="poisson", target="claims", terms=2, train_rows=356, metrics=poisson) == (
        "Poisson regression of claims on 2 terms, fitted on 356 training rows. On 244 held-out rows the mean absolute "
        "error is 0.43 and the mean prediction 0.33 against a mean observed 0.29."
    )
    assert model_reading(family="gaussian", target="spend", terms=2, train_rows=10, metrics={"rows": 0},
                         converged=False, penalized=True) == (
        "Linear regression of spend on 2 terms, fitted on 10 training rows. The fit did not converge: do not use these "
        "estimates. It was fitted with a penalty, which shrinks the coefficients together: it has no valid intervals or "
        "p-values, and its AIC and BIC count the effective degrees of freedom. No rows "
        "were held out, so there are no holdout metrics."
    )
