"""Two fits of one target side by side: may they be compared, and the likelihood-ratio test when nested.

The likelihood-ratio test compares a model with a larger one that contains all its terms, fitted on
the same rows: 2 (llf_larger - llf_smaller) follows a chi-squared distribution with as many degrees
of freedom as the larger model has extra coefficients, when the extra terms add nothing. A term
belongs to both models only when its fingerprint (its meaning) is the same in both fitted files.
"""

from __future__ import annotations

from dataclasses import dataclass

from ...errors import FeatpipeError
from .. import FittedModel


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
    df = _coefficient_count(larger) - _coefficient_count(smaller)
    extra = tuple(term.name for term in larger.model_terms if (term.name, term.fingerprint) not in _terms(smaller))
    return LikelihoodRatio(larger.model, smaller.model, statistic, df, float(chi2.sf(statistic, df)), extra)


def _terms(fitted: FittedModel) -> frozenset[tuple[str, str | None]]:
    return frozenset((term.name, term.fingerprint) for term in fitted.model_terms)


def _coefficient_count(fitted: FittedModel) -> int:
    """Coefficients, not terms: a learned term of several columns has one per column."""
    return sum(len(term.learned["columns"]) if term.learned else 1 for term in fitted.terms)


def _penalized(fitted: FittedModel) -> bool:
    return bool(fitted.fit.get("penalized")) or any(float(value or 0) > 0 for value in fitted.penalty.values())
