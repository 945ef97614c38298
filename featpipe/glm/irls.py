"""IRLS, written once over a statistics source, for several fits in lockstep (a model and its null).

Each pass evaluates every unfinished fit at its current coefficients in one read of the data. A fit
stops when the step it is about to take would change the deviance by less than `tol` relative,
(predicted decrease) / (|deviance| + 0.1) as in R's glm criterion; that last step is still applied
(it is a Newton step, so it squares the remaining error). Standard errors need X'WX at the final
coefficients, and X'WX one step earlier is off by about the square root of that last change, so
unless the change was already below SETTLED one more pass evaluates the final coefficients. If a
step makes the (penalized) deviance worse, it is halved and evaluated again.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from ..errors import FeatpipeError
from .linalg import Alias, find_aliased
from .penalty import ScaledPenalty
from .sources import Request, Statistics, StatisticsSource

MAX_HALVINGS = 30
SETTLED = 1e-15  # a last change this small leaves X'WX, so the standard errors, exact to about 3e-8
WORSE = 1e-12  # relative increase of the objective that counts as a worse step (not rounding)


class AliasedTerms(Exception):
    """X'WX is singular at the start: some columns are linear combinations of others."""

    def __init__(self, aliases: list[Alias]):
        super().__init__(f"aliased columns {[alias.column for alias in aliases]}")
        self.aliases = aliases


@dataclass(frozen=True)
class IrlsResult:
    terms: tuple[int, ...]
    beta: np.ndarray  # final coefficients (after the last step when converged)
    statistics: Statistics  # at the final coefficients (one step before them if the run was cut short)
    step: np.ndarray  # the last step computed (applied when converged): large when estimates run away
    iterations: int  # passes this fit took part in
    converged: bool
    change: float  # relative deviance change of the last step
    aliases: tuple[Alias, ...]  # found at the start (only when they are allowed)


@dataclass(eq=False)
class _Fit:
    terms: tuple[int, ...]
    beta: np.ndarray
    accepted: np.ndarray | None = None
    objective: float = math.inf
    statistics: Statistics | None = None
    iterations: int = 0
    halvings: int = 0
    change: float = math.inf
    converged: bool = False
    done: bool = False
    final: np.ndarray | None = None
    refining: bool = False  # converged; the next pass only evaluates the final coefficients
    step: np.ndarray | None = None
    aliases: tuple[Alias, ...] = field(default_factory=tuple)

    def result(self) -> IrlsResult:
        final = self.final if self.final is not None else self.accepted
        return IrlsResult(self.terms, final, self.statistics, self.step, self.iterations, self.converged, self.change, self.aliases)


def run_irls(
    source: StatisticsSource,
    starts: Sequence[Request],
    penalty: ScaledPenalty,
    total_weight: float,
    max_iter: int,
    tol: float,
    allow_aliasing: bool = False,
    first: list[Statistics] | None = None,
) -> list[IrlsResult]:
    """Fit every start to convergence (or `max_iter` passes); one result per start, in order.

    `first` holds the statistics of the starts when a pass already computed them. Raises
    `AliasedTerms` when a fit's X'WX is singular at its start and `allow_aliasing` is off. Each
    request of a fit is its start with the current coefficients, so a start of a Request subclass
    (a cross-validation fold's) keeps telling the source whose fit it is.
    """
    fits = [_Fit(start.terms, np.asarray(start.beta, dtype=float)) for start in starts]
    penalties = {id(fit): penalty.for_terms(fit.terms) for fit in fits}
    origins = {id(fit): start for fit, start in zip(fits, starts, strict=True)}
    while active := [fit for fit in fits if not fit.done]:
        if first is not None:
            evaluated, first = first, None
        else:
            evaluated = source.evaluate([replace(origins[id(fit)], beta=fit.beta) for fit in active])
        for fit, statistics in zip(active, evaluated, strict=True):
            fit.iterations += 1
            _advance(fit, statistics, penalties[id(fit)], total_weight, tol, allow_aliasing)
            if not fit.done and fit.iterations >= max_iter:
                fit.done = True
    return [fit.result() for fit in fits]


def _advance(fit: _Fit, statistics: Statistics, penalty: ScaledPenalty, total_weight: float, tol: float, allow_aliasing: bool) -> None:
    if fit.refining:
        fit.done = True
        if math.isfinite(statistics.deviance) and np.isfinite(statistics.xtwx).all():
            fit.statistics = statistics
        return
    objective = statistics.deviance + 2.0 * total_weight * penalty.value(fit.beta)
    if fit.accepted is None:
        if not (math.isfinite(objective) and np.isfinite(statistics.xtwx).all()):
            raise FeatpipeError(
                "the deviance is not finite at the starting values; check the terms for extreme values "
                "(a term of order 1e150 or more overflows)"
            )
        aliases = find_aliased(statistics.xtwx)
        if aliases and not allow_aliasing:
            raise AliasedTerms(aliases)
        fit.aliases = tuple(aliases)
    elif not objective <= fit.objective + WORSE * abs(fit.objective):  # also catches NaN
        if fit.halvings < MAX_HALVINGS:
            fit.halvings += 1
            fit.beta = (fit.beta + fit.accepted) / 2.0
            return
        fit.done = True  # no step along this direction helps: stop at the last accepted point
        return
    fit.halvings = 0
    fit.accepted, fit.objective, fit.statistics = fit.beta, objective, statistics
    new, decrease = penalty.step(statistics.xtwx, statistics.score, fit.beta, total_weight)
    fit.step = new - fit.beta
    fit.change = decrease / (abs(statistics.deviance) + 0.1)
    if not np.isfinite(new).all():
        fit.done = True  # the solve broke down: stop at the last good point, reported as not converged
    elif fit.change < tol:
        fit.converged, fit.final = True, new
        fit.refining = fit.change > SETTLED
        fit.done = not fit.refining
        fit.beta = new
    else:
        fit.beta = new
