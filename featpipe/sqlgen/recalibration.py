"""The sums of one Newton step of the recalibration fits, as one aggregate over scored rows.

Recalibration regresses the observed outcome on the model's own linear predictor eta with the model's
family and (canonical) link (Van Calster et al., "Calibration: the Achilles heel of predictive
analytics", BMC Medicine 2019): the calibration intercept a0 is fitted with eta as an offset,
g(mu) = a0 + eta (0 when predictions are right on average), the calibration slope b with eta as the
one covariate, g(mu) = a + b eta (1 when predictions are neither too extreme nor too modest). For a
canonical link the Newton step needs only sum (y - mu) x and sum V(mu) x x', V the family's variance
function, so each step is one pass that returns seven numbers.
"""

from __future__ import annotations

from sqlglot import exp

from .common import alias, column, number
from .metrics import ETA, OBSERVED, prediction

CANONICAL = ("binomial", "poisson", "gaussian")  # families whose link is canonical: Newton is Fisher scoring


def recalibration_query(rows: exp.Select, family: str, offset_intercept: float, intercept: float, slope: float) -> exp.Select:
    """One row at the current estimates of both fits over `rows` (KEY, OBSERVED, ETA):
    in-the-large (a0 = `offset_intercept`): sum (y - mu), sum V; slope fit (a = `intercept`, b = `slope`):
    sum (y - mu), sum (y - mu) eta, sum V, sum V eta, sum V eta^2."""
    if family not in CANONICAL:
        raise ValueError(f"recalibration is written for {', '.join(CANONICAL)} models, not '{family}'")
    y, eta = column(OBSERVED), column(ETA)
    # Parenthesized: sqlglot adds no parentheses by precedence, and a gaussian mean is the sum itself.
    in_the_large = exp.Paren(this=prediction(family, exp.Add(this=number(offset_intercept), expression=eta.copy())))
    with_slope = exp.Paren(this=prediction(
        family, exp.Add(this=number(intercept), expression=exp.Mul(this=number(slope), expression=eta.copy()))))
    residual_large = exp.Paren(this=exp.Sub(this=y.copy(), expression=in_the_large))
    residual = exp.Paren(this=exp.Sub(this=y.copy(), expression=with_slope.copy()))
    variance_large, variance = _variance(family, in_the_large), _variance(family, with_slope)
    return exp.select(
        alias(exp.Sum(this=residual_large), "_score_large"),
        alias(exp.Sum(this=variance_large), "_information_large"),
        alias(exp.Sum(this=residual), "_score"),
        alias(exp.Sum(this=exp.Mul(this=residual.copy(), expression=eta.copy())), "_score_eta"),
        alias(exp.Sum(this=variance), "_information"),
        alias(exp.Sum(this=exp.Mul(this=variance.copy(), expression=eta.copy())), "_information_eta"),
        alias(exp.Sum(this=exp.Mul(this=variance.copy(), expression=exp.Mul(this=eta.copy(), expression=eta.copy()))),
              "_information_eta2"),
    ).from_(rows.subquery("_rows"))


def _variance(family: str, mu: exp.Expression) -> exp.Expression:
    """V(mu): binomial mu (1 - mu), poisson mu, gaussian 1."""
    if family == "binomial":
        return exp.Mul(this=exp.Paren(this=mu.copy()), expression=exp.Paren(this=exp.Sub(this=number(1.0), expression=mu.copy())))
    if family == "poisson":
        return mu.copy()
    return number(1.0)
