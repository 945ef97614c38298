"""Plain-language readings of fitted terms and models: pure functions from numbers to sentences.

A reading states the effect per step on the scale a practitioner thinks in (odds for a logistic
model, expected count for a Poisson model, the target's own units for a linear model), its 95%
interval, and the cautions that change how it may be read: an unmet sign expectation, an interval
that includes no effect, collinearity, terms that move together, a penalty.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping

from . import Effect

EFFECT_KINDS = {"binomial": "odds ratio", "poisson": "rate ratio", "gaussian": "difference", "gamma": "ratio of means",
                "tweedie": "ratio of means", "quasipoisson": "rate ratio", "quasibinomial": "odds ratio"}
NO_EFFECT = {"odds ratio": "an odds ratio of 1", "rate ratio": "a rate ratio of 1", "difference": "a difference of 0",
             "ratio of means": "a ratio of means of 1"}
# Variance inflation factors above 5 and above 10 signal collinearity (common practice thresholds).
VIF_MODERATE, VIF_STRONG = 5.0, 10.0
MODEL_NAMES = {"binomial": "Logistic regression", "poisson": "Poisson regression", "gaussian": "Linear regression",
               "gamma": "Gamma regression (log link)", "tweedie": "Tweedie regression (log link)",
               "quasipoisson": "Quasi-Poisson regression", "quasibinomial": "Quasi-binomial logistic regression"}


def words(name: str) -> str:
    """Readable words from an identifier: firm_age_years -> "firm age years"."""
    return " ".join(part for part in name.split("_") if part)


def effect(family: str, estimate: float, ci_low: float | None, ci_high: float | None, step: float = 1.0,
           basis: str = "step") -> Effect:
    """The effect of `step` more units of a term: exp(step * b) as an odds or rate ratio, or step * b.

    The interval is transformed the same way (ordered low to high); None bounds without an interval.
    `basis` records where the step came from (see `effect_step`).
    """
    kind = _kind(family)
    scale = _difference if kind == "difference" else _ratio
    value = scale(step * estimate)
    if ci_low is None or ci_high is None:
        return Effect(kind=kind, step=float(step), value=value, low=None, high=None, basis=basis)
    low, high = sorted((scale(step * ci_low), scale(step * ci_high)))
    return Effect(kind=kind, step=float(step), value=value, low=low, high=high, basis=basis)


def effect_step(kind: str, given: float | None, training_sd: float | None) -> tuple[float, str]:
    """The step an effect is stated per, and its basis: an indicator is read as 1 rather than 0; otherwise
    the spec's step, or, when none is given, one training standard deviation of the term, so a term on a
    tiny or huge scale still gets an effect of readable size (1 when the sd is unknown)."""
    if kind == "boolean":
        return 1.0, "indicator"
    if given is not None:
        return float(given), "step"
    if training_sd is not None and math.isfinite(training_sd) and training_sd > 0:
        return float(training_sd), "sd"
    return 1.0, "step"


def _kind(family: str) -> str:
    if family not in EFFECT_KINDS:
        raise ValueError(f"unknown family '{family}'; use one of {', '.join(EFFECT_KINDS)}")
    return EFFECT_KINDS[family]


def _ratio(value: float) -> float:
    try:
        return math.exp(value)
    except OverflowError:
        return math.inf


def _difference(value: float) -> float:
    return float(value)


def term_notes(
    *,
    name: str,
    family: str,
    target: str,
    estimate: float,
    ci_low: float | None,
    ci_high: float | None,
    p_value: float | None = None,
    step: float = 1.0,
    kind: str = "numeric",
    unit_phrase: str | None = None,
    expect: str | None = None,
    vif: float | None = None,
    related: Iterable[str] = (),
    human_note: str | None = None,
    penalized: bool = False,
    basis: str = "step",
) -> tuple[str, ...]:
    """The notes of one term, in reading order: the human note from the spec (unchanged), the effect in
    words, the expected sign, a penalty caveat, an interval that includes no effect, collinearity
    (VIF above 5 or 10), and the `related` terms (those it is built from or shares input columns with)
    that must be read with it.

    `kind` is "numeric" or "boolean" (an indicator is read as 1 rather than 0, ignoring `step`);
    `unit_phrase` names `step` units, e.g. "years of firm age" for "each 5 more years of firm age";
    `basis` "sd" says the step is one training standard deviation (see `effect_step`).
    """
    notes = [human_note] if human_note else []
    size = effect(family, estimate, ci_low, ci_high, 1.0 if kind == "boolean" else step, basis)
    notes.append(_reading(name, family, target, size, kind, unit_phrase))
    if expect:
        notes.append(_expectation(expect, estimate))
    if penalized:
        notes.append(PENALIZED_TERM)
    if ci_low is not None and ci_high is not None and ci_low <= 0 <= ci_high:
        notes.append(_no_effect(family, p_value))
    if vif is not None and vif > VIF_MODERATE:
        notes.append(_collinearity(vif))
    others = list(dict.fromkeys(other for other in related if other != name))
    if others:
        they = "they change" if len(others) > 1 else "it changes"
        notes.append(f"read together with {_listing(others)}: its effect cannot be held fixed while {they}")
    return tuple(notes)


# A penalty shrinks the coefficients jointly: with correlated terms one estimate may grow or change sign.
PENALIZED_TERM = ("fitted with a penalty, which shrinks the coefficients together rather than each toward zero "
                  "(with correlated terms an estimate may grow or change sign): there is no valid 95% interval or p-value")


def _reading(name: str, family: str, target: str, size: Effect, kind: str, unit_phrase: str | None) -> str:
    if kind == "boolean":
        subject = f"{words(name)} (1 rather than 0)"
    elif size.basis == "sd":
        subject = f"each increase of one training standard deviation ({_step(size.step)}) in {words(name)}"
    elif unit_phrase:
        subject = f"each {_step(size.step)} more {unit_phrase}"
    elif size.step == 1:
        subject = f"each one-unit increase in {words(name)}"
    else:
        subject = f"each increase of {_step(size.step)} in {words(name)}"
    signed = size.kind == "difference"
    if not math.isfinite(size.value) or (not signed and size.value == 0):  # exp overflowed or underflowed
        return (f"{subject} changes the prediction by more than a double can hold: the step is far too large for this "
                "estimate; give a smaller step for this term in the spec")
    if size.kind == "odds ratio":
        verb = f"multiplies the odds of {words(target)} by {figure(size.value)}"
    elif size.kind == "rate ratio":
        verb = f"multiplies the expected count by {figure(size.value)}"
    elif size.kind == "ratio of means":
        verb = f"multiplies the expected {words(target)} by {figure(size.value)}"
    else:
        verb = f"changes {words(target)} by {figure(size.value, signed)}"
    interval = ""
    if size.low is not None and size.high is not None and math.isfinite(size.low) and math.isfinite(size.high):
        interval = f" (95% interval {figure(size.low, signed)} to {figure(size.high, signed)})"
    return f"{subject} {verb}{interval}, other terms held fixed"


def _expectation(expect: str, estimate: float) -> str:
    sign = "positive" if estimate > 0 else "negative" if estimate < 0 else "zero"
    if sign == expect:
        return f"expected {expect}: met"
    return f"expected {expect} but the estimate is {sign}: review the term or the data"


def _no_effect(family: str, p_value: float | None) -> str:
    p = f", {p_text(p_value)}" if p_value is not None else ""
    return f"the interval includes no effect ({NO_EFFECT[_kind(family)]}){p}: the data do not show a clear effect of this term"


def _collinearity(vif: float) -> str:
    # The VIF is taken at the fitted IRLS weights (as from the coefficient covariance), see `CONVENTIONS`.
    if vif > VIF_STRONG:
        return (f"weighted VIF {vif:.1f} is above {VIF_STRONG:g}: collinearity with other terms multiplies the "
                f"variance of the estimate by {vif:.1f}, making it unstable and its interval wide")
    return (f"weighted VIF {vif:.1f} is above {VIF_MODERATE:g}: collinearity with other terms multiplies the variance "
            f"of the estimate by {vif:.1f} and widens the interval")


def _listing(names: list[str]) -> str:
    return names[0] if len(names) == 1 else f"{', '.join(names[:-1])} and {names[-1]}"


def _step(step: float) -> str:
    return f"{step:g}"


def figure(value: float, signed: bool = False) -> str:
    """A number for a sentence: two decimals from 0.1 up to 1,000, whole above, two significant digits below."""
    sign = "+" if signed else ""
    magnitude = abs(value)
    if not math.isfinite(value):
        return f"{value:{sign}}"
    if magnitude >= 1000:
        return f"{value:{sign},.0f}"
    if magnitude >= 0.1 or magnitude == 0:
        return f"{value:{sign}.2f}"
    return f"{value:{sign}.2g}"


def p_text(p_value: float) -> str:
    return "p < 0.001" if p_value < 0.001 else f"p = {p_value:.2g}"


def model_reading(
    *,
    family: str,
    target: str,
    terms: int,
    train_rows: int,
    metrics: Mapping,
    threshold: float = 0.5,
    converged: bool = True,
    penalized: bool = False,
) -> str:
    """One paragraph summing up a fitted model and its holdout metrics (see featpipe.fitting.metrics)."""
    if family not in MODEL_NAMES:
        raise ValueError(f"unknown family '{family}'; use one of {', '.join(MODEL_NAMES)}")
    plural = "term" if terms == 1 else "terms"
    sentences = [f"{MODEL_NAMES[family]} of {words(target)} on {terms} {plural}, fitted on {train_rows:,} training rows."]
    if not converged:
        sentences.append("The fit did not converge: do not use these estimates.")
    if penalized:
        sentences.append("It was fitted with a penalty, which shrinks the coefficients together: it has no valid "
                         "intervals or p-values, and its AIC and BIC count the effective degrees of freedom.")
    rows = metrics.get("rows", 0)
    if not rows:
        sentences.append("No rows were held out, so there are no holdout metrics.")
    elif family in ("binomial", "quasibinomial"):
        accuracy, baseline = metrics["accuracy"], metrics["baseline_accuracy"]
        verdict = "" if accuracy > baseline else ", so at this threshold it is no better than the baseline"
        auc = f" Its AUC is {metrics['auc']:.2f}." if metrics.get("auc") is not None else ""
        sentences.append(
            f"On {rows:,} held-out rows it classifies {accuracy:.1%} correctly at threshold {threshold:g}, against "
            f"{baseline:.1%} for always predicting the majority class{verdict}.{auc}"
        )
    else:
        sentences.append(
            f"On {rows:,} held-out rows the mean absolute error is {figure(metrics['mean_absolute_error'])} and the "
            f"mean prediction {figure(metrics['mean_predicted'])} against a mean observed {figure(metrics['mean_observed'])}."
        )
    return " ".join(sentences)
