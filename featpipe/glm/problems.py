"""Problems a fit can meet, each explained with what to do: errors stop the fit, warnings travel with it."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from ..errors import FeatpipeError
from ..sqlgen.statistics import TrainingProfile
from .families import Family
from .linalg import Alias
from .sources import Scaling

EVENTS_PER_TERM = 10  # common practice: fewer events per term than this gives unstable estimates
RUNAWAY_TERMS = 3  # terms named in a separation message
RUNAWAY_STEP = 0.01  # a last step this large (per sd of the term, on the link scale) means no convergence


@dataclass(frozen=True)
class DataNames:
    """How messages name the data being fitted."""

    terms: tuple[str, ...]
    where: str  # the data itself: "design table ..." or "the arrays"
    target: str
    weight: str | None


def check_training_rows(profile: TrainingProfile, family: Family, data: DataNames) -> list[str]:
    """Refuse data the family cannot fit; return warnings about thin data."""
    where, target, weight = data.where, data.target, data.weight
    if profile.rows == 0:
        raise FeatpipeError(
            f"{where} has no training rows: every row is held out or has a NULL target, offset, weight or term; "
            "check holdout.fraction and the terms that produce NULLs"
        )
    if weight and profile.nonpositive_weights:
        raise FeatpipeError(
            f"{where}: weight '{weight}' is zero or negative on {profile.nonpositive_weights} training rows; "
            "prior weights must be positive: filter those rows out or fix the weight column"
        )
    _check_target_domain(profile, family, where, target)
    _check_positive_domain(profile, family, where, target)
    bad = [term.name for term in profile.terms if not all(map(math.isfinite, (term.mean, term.min, term.max)))]
    if bad:
        raise FeatpipeError(
            f"{where}: term(s) {_names(bad)} have infinite or NaN values on the training rows; guard divisions "
            "with NULLIF and logarithms with a CASE in the term definitions"
        )
    constant = [term for term in profile.terms if term.min == term.max]
    if constant:
        values = ", ".join(f"'{term.name}' = {term.min:g}" for term in constant)
        raise FeatpipeError(
            f"{where}: term(s) constant on all {profile.rows} training rows ({values}), so their coefficients "
            "cannot be told apart from the intercept; remove them from the model's terms or check their definitions"
        )
    coefficients = len(profile.terms) + 1
    if profile.rows <= coefficients:
        raise FeatpipeError(
            f"{where}: {profile.rows} training rows for {coefficients} coefficients; a fit needs more rows than "
            "coefficients: add data or remove terms"
        )
    return _thin_data(profile, family)


def _check_target_domain(profile: TrainingProfile, family: Family, where: str, target: str) -> None:
    observed = f"(training values range from {profile.target_min:g} to {profile.target_max:g})"
    if family.name == "binomial":
        if profile.not_binary:
            raise FeatpipeError(
                f"{where}: a binomial target must be 0 or 1, but '{target}' has other values on "
                f"{profile.not_binary} training rows {observed}; recode it as 0/1 or a boolean, or choose "
                "another family"
            )
        if profile.target_sum in (0, profile.rows):
            raise FeatpipeError(
                f"{where}: target '{target}' is {profile.target_min:g} on every training row, so there is nothing "
                "to model; check the target definition and the holdout split"
            )
    if family.name == "poisson":
        if profile.negative:
            raise FeatpipeError(
                f"{where}: a poisson target is a count, but '{target}' is negative on {profile.negative} training "
                f"rows {observed}; fix the target or choose family: gaussian"
            )
        if profile.not_integer:
            raise FeatpipeError(
                f"{where}: a poisson target is a count, but '{target}' is not a whole number on "
                f"{profile.not_integer} training rows {observed}; model the count itself and put the exposure "
                "in `offset: LN(exposure)` instead of dividing by it"
            )
        if profile.target_sum == 0:
            raise FeatpipeError(f"{where}: target '{target}' is 0 on every training row, so there is nothing to model")


def _check_positive_domain(profile: TrainingProfile, family: Family, where: str, target: str) -> None:
    """gamma needs a positive target; tweedie and quasipoisson one that is never negative; quasibinomial a
    proportion (0 to 1)."""
    if profile.rows == 0 or family.name not in ("gamma", "tweedie", "quasipoisson", "quasibinomial"):
        return
    observed = f"(training values range from {profile.target_min:g} to {profile.target_max:g})"
    if family.name == "gamma" and profile.target_min <= 0:
        raise FeatpipeError(
            f"{where}: a gamma target is a positive amount, but '{target}' is zero or negative on some training rows "
            f"{observed}; leave the rows without an amount out of the severity model, or choose family: tweedie "
            "(exact zeros allowed)"
        )
    if family.name in ("tweedie", "quasipoisson") and profile.negative:
        raise FeatpipeError(
            f"{where}: a {family.name} target is never negative, but '{target}' is negative on {profile.negative} "
            f"training rows {observed}; fix the target or choose family: gaussian"
        )
    if family.name == "quasibinomial" and (profile.negative or profile.target_max > 1):
        raise FeatpipeError(
            f"{where}: a quasibinomial target is a proportion from 0 to 1, but '{target}' is not {observed}; "
            "divide successes by trials and give the trials as weights"
        )
    if profile.target_sum == 0:
        raise FeatpipeError(f"{where}: target '{target}' is 0 on every training row, so there is nothing to model")


def _thin_data(profile: TrainingProfile, family: Family) -> list[str]:
    if family.name in ("gaussian", "gamma", "tweedie") or not profile.terms:
        return []
    if family.link == "logit":
        events = min(profile.target_sum, profile.rows - profile.target_sum)
        kind = "events (rows of the rarer outcome)"
    else:
        events, kind = profile.target_sum, "events (total count)"
    per_term = events / len(profile.terms)
    if per_term >= EVENTS_PER_TERM:
        return []
    return [
        f"only {events:g} {kind} for {len(profile.terms)} terms ({per_term:.1f} per term); with fewer than "
        f"{EVENTS_PER_TERM} per term (common practice) estimates are unstable and look better than they are: "
        "remove terms, add data, or add an l2 penalty"
    ]


def aliased_message(aliases: Sequence[Alias], data: DataNames, scaling: Scaling) -> str:
    """Each aliased term written as the combination of earlier terms it equals, on the original scale."""
    names = data.terms
    lines = [_combination(alias, names, scaling) for alias in aliases]
    dropped = _names([names[alias.column - 1] for alias in aliases])
    return (
        f"{data.where}: term(s) {dropped} are linear combinations of other terms on the training rows, "
        f"so their coefficients are not identified: {'; '.join(lines)}. Remove {dropped} from the model's terms "
        "(or one of the terms each is built from)"
    )


def _combination(alias: Alias, names: Sequence[str], scaling: Scaling) -> str:
    """x_j = m_j + s_j (c_0 + sum_k c_k (x_k - m_k) / s_k), with tiny coefficients left out."""
    j = alias.column - 1
    center, scale = scaling.centers[j], scaling.scales[j]
    constant = center + scale * alias.coefficients[0]
    parts = []
    for column, coefficient in zip(alias.basis[1:], alias.coefficients[1:], strict=True):
        k = column - 1
        factor = scale * coefficient / scaling.scales[k]
        constant -= factor * scaling.centers[k]
        parts.append((factor, names[k]))
    largest = max([abs(f) for f, _ in parts] + [abs(constant), 1e-300])
    pieces = [(factor, f" * '{name}'") for factor, name in parts if abs(factor) > 1e-9 * largest]
    if abs(constant) > 1e-9 * largest or not pieces:
        pieces.append((constant, ""))
    text = f"{pieces[0][0]:.6g}{pieces[0][1]}"
    for value, what in pieces[1:]:
        text += f" {'-' if value < 0 else '+'} {abs(value):.6g}{what}"
    return f"'{names[j]}' = {text}"


def runaway_terms(step: np.ndarray) -> list[int]:
    """Term indices (0-based) whose last IRLS step still moved the estimate per sd by RUNAWAY_STEP or more.

    At convergence a step is tiny; under separation the likelihood keeps rising along a direction,
    each step adds about as much as the one before, and only the change in deviance becomes small.
    """
    largest = float(np.abs(step[1:]).max(initial=0.0))
    moving = [j for j in range(len(step) - 1) if abs(step[j + 1]) >= max(RUNAWAY_STEP, largest / 10)]
    return sorted(moving, key=lambda j: -abs(step[j + 1]))[:RUNAWAY_TERMS]


def separation(
    family: Family, boundary_rows: int, names: Sequence[str], terms: list[int], standardized: np.ndarray, statistic: np.ndarray | None
) -> str:
    """Explain estimates that run away (`terms`) or fitted values at the boundary of the family."""
    if family.name == "binomial":
        boundary = f"{boundary_rows} training rows have fitted probabilities within 1e-10 of 0 or 1"
        cause = "complete or quasi-complete separation: they predict the target perfectly on some rows"
    else:
        boundary = f"{boundary_rows} training rows have fitted means below 1e-10"
        cause = "they single out rows whose counts are all 0"
    if not terms:
        return f"{boundary}; check the terms for extreme values"
    described = []
    for j in terms:
        z = "" if statistic is None else f", z {statistic[j + 1]:.2f}"
        described.append(f"'{names[j]}' (estimate per sd {standardized[j + 1]:.3g}{z})")
    if boundary_rows:
        cause = f"{cause}; {boundary}"
    return (
        f"the estimates of {', '.join(described)} run away instead of converging ({cause}). "
        "Add an l2 penalty to the model spec (penalty: {l2: 0.01}) or drop or merge the terms that separate the target"
    )


def not_converged(max_iter: int, change: float) -> str:
    return (
        f"IRLS did not converge within max_iter={max_iter} iterations: the last step still changed the deviance by {change:.1e} "
        "(relative); the estimates are not final. Raise max_iter, rescale terms with extreme values, or add an "
        "l2 penalty"
    )


def penalized_inference(l2: float, l1: float) -> str:
    return (
        f"penalized fit (l2 {l2:g}, l1 {l1:g} on standardized terms): standard errors, p-values and intervals are "
        "not reported because plain Wald inference does not hold for penalized estimates"
    )


def _names(names: Sequence[str]) -> str:
    return ", ".join(f"'{name}'" for name in names)
