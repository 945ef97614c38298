"""The per-row SQL of the families beyond binomial, poisson and gaussian, as `glm.families` computes them.

- quasipoisson and quasibinomial sum exactly what poisson and binomial sum (`sums_family`); only the
  dispersion read from those sums differs.
- gamma and tweedie (power p in (1, 2)) take the log link, not canonical for them, so the working
  weight is mu^2 / V(mu) and a row's score residual (y - mu) mu / V(mu). Every power of mu is written
  as EXP(k * eta) of the clamped linear predictor, so no division or POWER is needed:

  gamma:   weight 1, residual y e^-eta - 1, unit deviance 2 (y e^-eta - 1 - ln y + eta),
           Pearson (y e^-eta - 1)^2;
  tweedie: weight e^((2-p) eta), residual (y - mu) e^((1-p) eta), Pearson (y - mu)^2 e^(-p eta),
           unit deviance 2 (y^(2-p) / ((1-p)(2-p)) - y e^((1-p) eta) / (1-p) + e^((2-p) eta) / (2-p)),
           y^(2-p) = e^((2-p) ln y) for y > 0 and 0 at y = 0.

>>> from sqlglot import exp
>>> weight, residual, deviance = log_link_parts("gamma", None, exp.column("y"), exp.column("eta"))
>>> residual.sql()
'y * EXP(-eta) - CAST(1.0 AS DOUBLE)'
"""

from __future__ import annotations

from sqlglot import exp

from .common import number

SUMS_AS = {"quasipoisson": "poisson", "quasibinomial": "binomial"}
LOG_LINK = ("gamma", "tweedie")  # the families whose log link is not canonical


def sums_family(family: str) -> str:
    """The family whose per-row sums `family` takes (a quasi family takes its base family's)."""
    return SUMS_AS.get(family, family)


def _exp_times(k: float, eta: exp.Expression) -> exp.Expression:
    """EXP(k * eta)."""
    return exp.Exp(this=exp.Mul(this=number(k), expression=eta.copy()))


def _ratio_minus_one(y: exp.Expression, eta: exp.Expression) -> exp.Expression:
    """(y - mu) / mu = y e^-eta - 1."""
    return exp.Sub(this=exp.Mul(this=y.copy(), expression=exp.Exp(this=exp.Neg(this=eta.copy()))), expression=number(1.0))


def _y_power(y: exp.Expression, power: float) -> exp.Expression:
    """y^power for y >= 0: EXP(power * LN(y)) where y > 0, 0 at y = 0 (LN never sees 0)."""
    positive = exp.GT(this=y.copy(), expression=number(0.0))
    ln_y = exp.Ln(this=exp.Case(ifs=[exp.If(this=positive, true=y.copy())]))
    return exp.Case(ifs=[exp.If(this=positive.copy(), true=exp.Exp(this=exp.Mul(this=number(power), expression=ln_y)))],
                    default=number(0.0))


def log_link_parts(family: str, power: float | None, y: exp.Expression, eta: exp.Expression):
    """Per-row (working weight, score residual, unit deviance) of gamma or tweedie before prior weights."""
    if family == "gamma":
        ratio = _ratio_minus_one(y, eta)
        ln_y = exp.Ln(this=exp.Case(ifs=[exp.If(this=exp.GT(this=y.copy(), expression=number(0.0)), true=y.copy())]))
        inner = exp.Add(this=exp.Sub(this=ratio.copy(), expression=ln_y), expression=eta.copy())
        return number(1.0), ratio, exp.Mul(this=number(2.0), expression=exp.Paren(this=inner))
    if family == "tweedie":
        p = float(power)
        mu = exp.Exp(this=eta.copy())
        residual = exp.Mul(this=exp.Paren(this=exp.Sub(this=y.copy(), expression=mu)), expression=_exp_times(1.0 - p, eta))
        inner = exp.Add(
            this=exp.Sub(
                this=exp.Mul(this=_y_power(y, 2.0 - p), expression=number(1.0 / ((1.0 - p) * (2.0 - p)))),
                expression=exp.Mul(this=exp.Mul(this=y.copy(), expression=_exp_times(1.0 - p, eta)), expression=number(1.0 / (1.0 - p))),
            ),
            expression=exp.Mul(this=_exp_times(2.0 - p, eta), expression=number(1.0 / (2.0 - p))),
        )
        return _exp_times(2.0 - p, eta), residual, exp.Mul(this=number(2.0), expression=exp.Paren(this=inner))
    raise ValueError(f"{family!r} is not a log-link family with a non-canonical link; use one of {', '.join(LOG_LINK)}")


def log_link_pearson(family: str, power: float | None, y: exp.Expression, eta: exp.Expression) -> exp.Expression:
    """A row's (y - mu)^2 / V(mu) of gamma or tweedie before its prior weight."""
    if family == "gamma":
        ratio = exp.Paren(this=_ratio_minus_one(y, eta))
        return exp.Mul(this=ratio, expression=ratio.copy())
    residual = exp.Paren(this=exp.Sub(this=y.copy(), expression=exp.Exp(this=eta.copy())))
    return exp.Mul(this=exp.Mul(this=residual, expression=residual.copy()), expression=_exp_times(-float(power), eta))
