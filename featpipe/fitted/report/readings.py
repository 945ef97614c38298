"""The one-line reading in words above each section of the report: pure functions from figures to sentences."""

from __future__ import annotations

import math
from collections.abc import Sequence

from .. import FittedModel
from ..notes import figure, model_reading, p_text, words
from .compare import Comparison
from .data import Curve, ModelFigures, Surface

SIGNIFICANCE = 0.05  # common practice


def summary(fitted: FittedModel, figures: ModelFigures, warnings: Sequence[str]) -> str:
    """The model in one paragraph: what it predicts, on what, how well, and whether to trust the fit."""
    fit = fitted.fit
    text = model_reading(
        family=fitted.family, target=fitted.target, terms=len(fitted.model_terms), train_rows=fitted.rows["train"],
        metrics=fitted.metrics, threshold=fitted.threshold, converged=bool(fit.get("converged")),
        penalized=bool(fit.get("penalized")),
    )
    dropped = fitted.rows["input"] - fitted.rows["complete"]
    rows = f" Of {fitted.rows['input']:,} input rows, {fitted.rows['holdout']:,} were held out"
    rows += f" and {dropped:,} dropped for a missing value." if dropped else " and none was dropped."
    converged = (f" The fit converged in {fit['iterations']} iterations." if fit.get("converged")
                 else f" The fit stopped after {fit['iterations']} iterations without converging.")
    if warnings:
        caution = f" {len(warnings)} warning{'s' if len(warnings) > 1 else ''} below: read {'them' if len(warnings) > 1 else 'it'} before the figures."
    else:
        caution = " The fit raised no warning (separation, collinearity) and matches the current definitions."
    return text + rows + converged + caution


def coefficients(fitted: FittedModel) -> str:
    terms = [term for term in fitted.model_terms if term.effect is not None]
    if not terms:
        return "The model has no terms besides the intercept."
    no_effect = 1.0 if terms[0].effect.kind != "difference" else 0.0
    clear = [t for t in terms if t.effect.low is not None and not t.effect.low <= no_effect <= t.effect.high]
    strongest = max(terms, key=lambda t: abs(math.log(t.effect.value)) if no_effect == 1.0 and t.effect.value > 0
                    else abs(t.effect.value - no_effect))
    largest = (f"per the stated steps the largest is {strongest.name} "
               f"({strongest.effect.kind} {figure(strongest.effect.value)} per {strongest.effect.step:g}).")
    if all(t.effect.low is None for t in terms):
        return ("A penalized fit has no 95% intervals (the penalty shrinks the coefficients together, so Wald inference "
                f"does not hold): the plot shows the estimates only; {largest}")
    return f"{len(clear)} of {len(terms)} terms have a 95% interval that excludes no effect; {largest}"


def terms(fitted: FittedModel) -> str:
    count = len(fitted.model_terms)
    return (f"Each of the {count} terms is the SQL below, as stored in fitted/{fitted.model}.yaml: the scoring query "
            "computes exactly this, and a term's fingerprint changes whenever its meaning does.")


def curves(fitted: FittedModel, curve_list: Sequence[Curve], held: dict, other: FittedModel | None) -> str:
    if not curve_list:
        return "The model's terms read no input column, so there is no curve to draw."
    swings = []
    for curve in curve_list:
        values = [v for v in curve.predictions[fitted.model] if v is not None]
        if values:
            swings.append((max(values) - min(values), curve, min(values), max(values)))
    if not swings:
        return "No grid point could be scored (a term is NULL at the held values), so the curves are empty."
    swing, widest, low, high = max(swings, key=lambda item: item[0])
    texts = [f"{name} at {held[name]!r}" for name in held if held[name] is not None and isinstance(held[name], str)]
    levels = f" ({', '.join(texts)})" if texts else ""
    compared = f", {other.model} in the second colour" if other else ""
    return (f"How the {predicted_words(fitted)} moves as each input crosses its training values (1st to 99th percentile), "
            f"the other inputs held at their training medians{levels}{compared}; {widest.column} moves it most, "
            f"between {figure(low)} and {figure(high)}.")


def surface(fitted: FittedModel, shown: Surface | None, note: str, other: FittedModel | None) -> str:
    if shown is None:
        return f"No decision surface: {note}."
    combining = shown.combining[fitted.model]
    if combining:
        why = f"{', '.join(combining)} read{'s' if len(combining) == 1 else ''} both, which is what bends it"
    else:
        why = "no term reads both, so its shape comes only from how each enters the model on its own"
    if fitted.link == "logit":
        lead = (f"Over {shown.a} and {shown.b} (other inputs at their medians) the coloured line is the threshold "
                f"{fitted.threshold:g}: rows in the orange region would be predicted {words(fitted.target)}; {why}.")
    else:
        lead = (f"The {predicted_words(fitted)} over {shown.a} and {shown.b} (other inputs at their medians), its colour bands "
                f"spanning the held-out rows' predictions; {why}.")
    if other is not None:
        lead += f" {other.model} is drawn beside it on the same axes."
    return lead


def performance(fitted: FittedModel, figures: ModelFigures) -> str:
    metrics = fitted.metrics
    calibration = metrics.get("calibration") or []
    if not metrics.get("rows"):
        return "No rows were held out, so there is nothing to check the predictions against."
    top = calibration[-1] if calibration else None
    top_text = (f" In the top decile the mean prediction is {figure(top['mean_predicted'])} against "
                f"{figure(top['mean_observed'])} observed." if top else "")
    if fitted.link == "logit":
        auc = metrics.get("auc")
        lead = (f"AUC {auc:.2f}: a held-out row with {words(fitted.target)} gets a higher prediction than one without "
                f"{auc:.0%} of the time (0.5 is chance).") if auc is not None else "The held-out rows hold one class only."
        return lead + top_text
    medians = [d["q50"] for d in figures.residual_deciles]
    spread = (f" Median deviance residuals per decile lie between {figure(min(medians), True)} and "
              f"{figure(max(medians), True)}." if medians else "")
    return f"Observed against predicted on {metrics['rows']:,} held-out rows.{top_text}{spread}"


def comparison(fitted: FittedModel, other: FittedModel, found: Comparison) -> str:
    """The comparisons valid for the pair, in words, then the ones left out and why."""
    sentences = []
    test = found.likelihood_ratio
    if found.aic_difference is not None:
        better = fitted.model if found.aic_difference < 0 else other.model
        sentences.append(f"AIC favours {better} by {figure(abs(found.aic_difference))}.")
    if not test.reason:
        verdict = ("so the extra terms improve the fit by more than chance would" if test.p_value < SIGNIFICANCE
                   else "so the data do not show that the extra terms improve the fit")
        sentences.append(f"{test.larger} adds {', '.join(test.extra_terms)} to {test.smaller}: likelihood-ratio statistic "
                         f"{figure(test.statistic)} on {test.df} degrees of freedom, {p_text(test.p_value)}, {verdict}.")
    if found.f_test is not None:
        sentences.append(f"Beside it the F test, which estimates the dispersion: F = {figure(found.f_test.statistic)} on {found.f_test.df} and "
                         f"{found.f_test.residual_df:,} degrees of freedom, {p_text(found.f_test.p_value)}.")
    if found.auc_test is not None:
        paired = found.auc_test
        differs = ("a difference larger than chance would give" if paired.p_value < SIGNIFICANCE
                   else "a difference chance alone could give")
        sentences.append(f"On the same {paired.rows:,} held-out rows the AUCs are {paired.auc[0]:.3f} ({fitted.model}) and "
                         f"{paired.auc[1]:.3f} ({other.model}); DeLong's test gives z = {paired.z:.2f}, "
                         f"{p_text(paired.p_value)}: {differs}.")
    sentences.append(found.thresholds)
    if found.left_out:
        sentences.append("Left out: " + "; ".join(f"{what}, because {why}" for what, why in found.left_out) + ".")
    return " ".join(sentences)


def cautions(fitted: FittedModel, inputs: Sequence[str]) -> str:
    return (f"The model reads {', '.join(inputs) if inputs else 'no input column'}; before it informs decisions about "
            "people, review what each input stands for.")


def predicted_words(fitted: FittedModel) -> str:
    """What the model's prediction is, in words: also the axis label of every prediction."""
    if fitted.link == "logit":
        return f"predicted probability of {words(fitted.target)}"
    if fitted.family == "poisson":
        return f"expected {words(fitted.target)}"
    return f"predicted {words(fitted.target)}"
