"""Two fits of one target side by side: which comparisons are valid for the pair, their results, and
the ones left out with the reason.

- AIC compares log-likelihoods, so it needs the same training rows, the same family and weights, and
  two unpenalized, converged fits (a penalized fit maximizes another objective).
- The likelihood-ratio test compares a model with a larger one that contains all its terms, fitted on
  the same rows: 2 (llf_larger - llf_smaller) follows a chi-squared distribution with as many degrees
  of freedom as the larger model has extra coefficients, when the extra terms add nothing. A term
  belongs to both models only when its fingerprint (its meaning) is the same in both fitted files.
- For gaussian models, whose dispersion is estimated, the F test stands beside it:
  F = ((D_smaller - D_larger) / df) / (D_larger / (n - p_larger)), D the residual sum of squares.
- DeLong's test of two AUCs needs the same held-out rows (featpipe.glm.delong).
- Accuracy, precision and recall are read at each model's own threshold, which the comparison says.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

from ...errors import FeatpipeError
from ...sqlgen.ranks import RankSums
from .. import FittedModel

if TYPE_CHECKING:  # the glm package loads numpy, which the API (and so `featpipe check`) never needs
    from ...glm.delong import PairedAuc


@dataclass(frozen=True)
class LikelihoodRatio:
    """The test, or why it does not apply (`reason`, with the other fields None)."""

    larger: str | None = None
    smaller: str | None = None
    statistic: float | None = None
    df: int | None = None
    p_value: float | None = None
    extra_terms: tuple[str, ...] = ()
    reason: str | None = None


def check_comparable(fitted: FittedModel, other: FittedModel) -> None:
    """Refuse to compare fits of different targets or inputs: their metrics would not mean the same."""
    if fitted.model == other.model:
        raise FeatpipeError(f"--against {other.model}: a model cannot be compared with itself; name another model")
    if fitted.target != other.target or fitted.input != other.input:
        raise FeatpipeError(
            f"--against {other.model}: fitted/{other.model}.yaml models '{other.target}' of input '{other.input}' but "
            f"fitted/{fitted.model}.yaml models '{fitted.target}' of input '{fitted.input}'; compare two models of the "
            "same target and input"
        )


def likelihood_ratio(fitted: FittedModel, other: FittedModel, shared_rows: tuple[int, int, int]) -> LikelihoodRatio:
    """The likelihood-ratio test of the nested pair, or the reason it does not apply.

    `shared_rows` counts training rows of `fitted`, of `other` and of both (see
    featpipe.fitted.report.queries.shared_rows_query): the rows are the same when the three are equal.
    """
    mine, theirs = _terms(fitted), _terms(other)
    if mine == theirs:
        return LikelihoodRatio(reason="the two models have the same terms, so there is nothing to test")
    if theirs < mine:
        larger, smaller = fitted, other
    elif mine < theirs:
        larger, smaller = other, fitted
    else:
        return LikelihoodRatio(reason="neither model's terms are a subset of the other's (same name and fingerprint), "
                                      "so the models are not nested")
    for problem, applies in (
        (f"the families differ ({fitted.family} and {other.family})", fitted.family != other.family),
        ("the offsets differ", fitted.offset != other.offset),
        ("the weights differ", fitted.weights != other.weights),
        ("a model was fitted with a penalty, so its log-likelihood is not a maximum-likelihood one",
         _penalized(fitted) or _penalized(other)),
        ("a fit did not converge", not (fitted.fit.get("converged") and other.fit.get("converged"))),
        ("a model's family has no log-likelihood (tweedie or quasi)",
         fitted.fit.get("log_likelihood") is None or other.fit.get("log_likelihood") is None),
    ):
        if applies:
            return LikelihoodRatio(reason=f"{problem}; the likelihood-ratio test needs nested maximum-likelihood fits")
    this_rows, other_rows, both = shared_rows
    if not this_rows == other_rows == both:
        return LikelihoodRatio(reason=(
            f"the models were not fitted on the same rows ({this_rows:,} and {other_rows:,} training rows, "
            f"{both:,} in common), so their log-likelihoods are not comparable"))
    # scipy loads here, when a test is run, not when the API imports the report (`featpipe check`).
    from scipy.stats import chi2

    statistic = 2.0 * (larger.fit["log_likelihood"] - smaller.fit["log_likelihood"])
    df = coefficient_count(larger) - coefficient_count(smaller)
    extra = tuple(term.name for term in larger.model_terms if (term.name, term.fingerprint) not in _terms(smaller))
    return LikelihoodRatio(larger.model, smaller.model, statistic, df, float(chi2.sf(statistic, df)), extra)


def _terms(fitted: FittedModel) -> frozenset[tuple[str, str | None]]:
    return frozenset((term.name, term.fingerprint) for term in fitted.model_terms)


def coefficient_count(fitted: FittedModel) -> int:
    """Coefficients, not terms: a learned term of several columns has one per column."""
    return sum(len(term.learned["columns"]) if term.learned else 1 for term in fitted.terms)


def _penalized(fitted: FittedModel) -> bool:
    return bool(fitted.fit.get("penalized")) or any(float(value or 0) > 0 for value in fitted.penalty.values())


@dataclass(frozen=True)
class FTest:
    larger: str
    smaller: str
    statistic: float
    df: int  # extra coefficients of the larger model
    residual_df: int  # training rows less the larger model's coefficients
    p_value: float


@dataclass(frozen=True)
class Comparison:
    """The comparisons valid for a pair of fits, and the ones left out: (what, why) in `left_out`."""

    aic_difference: float | None  # the first model's AIC minus the second's; None when left out
    likelihood_ratio: LikelihoodRatio
    f_test: FTest | None
    auc_test: PairedAuc | None
    thresholds: str  # how the class metrics of the two models are to be read
    left_out: tuple[tuple[str, str], ...]


def compare(fitted: FittedModel, other: FittedModel, shared_rows: tuple[int, int, int],
            shared_holdout: tuple[int, int, int], auc_sums: RankSums | None) -> Comparison:
    """What may be compared between `fitted` and `other`: `shared_rows` and `shared_holdout` count the
    training and held-out rows of each and of both; `auc_sums` are DeLong's sums of the two models'
    predictions on their common held-out rows (binomial pairs; None otherwise)."""
    left_out: list[tuple[str, str]] = []
    aic_problem = _aic_problem(fitted, other, shared_rows)
    if aic_problem:
        left_out.append(("AIC", aic_problem))
    test = likelihood_ratio(fitted, other, shared_rows)
    if test.reason:
        left_out.append(("likelihood-ratio test", test.reason))
    f_test = None
    if "gaussian" in (fitted.family, other.family):
        f_test = _f_test(fitted, other, test)
        if f_test is None:
            left_out.append(("F test", test.reason or "it is for two gaussian models"))
    auc_test = None
    if fitted.family == other.family == "binomial":
        auc_test, why = _auc_test(shared_holdout, auc_sums)
        if why:
            left_out.append(("DeLong's test of the AUCs", why))
    return Comparison(None if aic_problem else fitted.fit["aic"] - other.fit["aic"], test, f_test, auc_test,
                      _thresholds(fitted, other, shared_holdout), tuple(left_out))


def _aic_problem(fitted: FittedModel, other: FittedModel, shared_rows: tuple[int, int, int]) -> str | None:
    this_rows, other_rows, both = shared_rows
    for problem, applies in (
        ((f"the models were not fitted on the same rows ({this_rows:,} and {other_rows:,} training rows, {both:,} in "
          "common), so their log-likelihoods are not comparable"), not this_rows == other_rows == both),
        (f"the families differ ({fitted.family} and {other.family}), so their log-likelihoods measure different things",
         fitted.family != other.family),
        ("the weights differ, so the log-likelihoods weigh the rows differently", fitted.weights != other.weights),
        ("a model was fitted with a penalty, so its log-likelihood is not a maximum-likelihood one",
         _penalized(fitted) or _penalized(other)),
        ("a fit did not converge", not (fitted.fit.get("converged") and other.fit.get("converged"))),
        ("a model's family has no likelihood featpipe computes (quasi families, tweedie, weighted gamma); compare their deviance",
         fitted.fit.get("aic") is None or other.fit.get("aic") is None),
    ):
        if applies:
            return problem
    return None


def _f_test(fitted: FittedModel, other: FittedModel, test: LikelihoodRatio) -> FTest | None:
    """The F test of the nested gaussian pair `test` describes, or None when the test does not apply."""
    if test.reason or not fitted.family == other.family == "gaussian":
        return None
    from scipy.stats import f

    larger, smaller = (fitted, other) if test.larger == fitted.model else (other, fitted)
    residual_df = larger.rows["train"] - coefficient_count(larger)
    if residual_df <= 0 or not larger.fit["deviance"] > 0:
        return None
    statistic = ((smaller.fit["deviance"] - larger.fit["deviance"]) / test.df) / (larger.fit["deviance"] / residual_df)
    return FTest(larger.model, smaller.model, statistic, test.df, residual_df, float(f.sf(statistic, test.df, residual_df)))


def _auc_test(shared_holdout: tuple[int, int, int], auc_sums: RankSums | None) -> tuple[PairedAuc | None, str | None]:
    this_rows, other_rows, both = shared_holdout
    if not this_rows == other_rows == both:
        return None, (f"the models were not measured on the same held-out rows ({this_rows:,} and {other_rows:,}, "
                      f"{both:,} in common); hold out the same rows (same fraction and salt) to compare their AUCs")
    if auc_sums is None:
        return None, "the held-out rows hold one class only"
    from ...glm.delong import paired_test

    found = paired_test(auc_sums)
    if found is None:
        return None, ("the two models order the held-out rows alike, or a class has fewer than two rows, so the "
                      "difference of their AUCs has no variance to test against")
    return found, None


def _thresholds(fitted: FittedModel, other: FittedModel, shared_holdout: tuple[int, int, int]) -> str:
    this_rows, other_rows, both = shared_holdout
    rows = ("Both models' holdout metrics are measured on the same held-out rows."
            if this_rows == other_rows == both else
            f"The holdout metrics are measured on different held-out rows ({this_rows:,} and {other_rows:,}, "
            f"{both:,} in common), so small differences may come from the rows rather than the models.")
    if not fitted.family == other.family == "binomial":
        return rows
    if fitted.threshold == other.threshold:
        return f"{rows} Accuracy, precision and recall use the same threshold, {fitted.threshold:g}, for both."
    return (f"{rows} Accuracy, precision and recall use each model's own threshold ({fitted.threshold:g} for "
            f"{fitted.model}, {other.threshold:g} for {other.model}): they compare two decision rules, not two scores; "
            "AUC, Gini, KS, log loss and Brier score do not depend on a threshold.")
