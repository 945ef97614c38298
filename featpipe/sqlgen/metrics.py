"""The linear predictor, the prediction and the metric queries over scored rows.

The metric queries read a rows query of three columns, KEY, OBSERVED and ETA (the linear predictor):
`scored_holdout` gives the held-out rows of a design table; any labelled table scored by a model
serves as well. Every metric is an aggregate over those rows, so only a few numbers leave the engine. Counts
come back as integer SUMs (exact), real-valued metrics as SUMs of DOUBLEs; the caller divides. The
rank-based AUC needs two window functions, and the calibration table one NTILE; their orders end
with the key, so ties between predictions are broken the same way on every run and engine.

Portability (the rules of sqlgen/harden.py): literals are exact DOUBLE casts, the linear predictor is clamped with CASE
before EXP (so EXP stays finite on PostgreSQL too), LN sees only arguments of at least 1 or ones
guarded by CASE WHEN y > 0, and the one division is guarded with NULLIF.
"""

from __future__ import annotations

from collections.abc import Mapping

from sqlglot import exp

from ..compiler.layout import DesignLayout
from ..project import FAMILIES
from ..project.names import INTERCEPT, ROWS
from .common import alias, column, holdout_rows, number
from .families import LOG_LINK, log_link_parts, sums_family

# EXP(700) is about 1e304 and EXP(-700) about 1e-304: finite and non-zero on every engine.
ETA_LIMIT = 700.0
DECILES = 10

# Column names inside the generated queries; term names start with a letter, so these never clash.
KEY, OBSERVED, ETA, PREDICTED, COUNTED = "_key", "_observed", "_eta", "_predicted", "_counted"
TWICE_RANK, DECILE = "_twice_rank", "_decile"


def linear_predictor(layout: DesignLayout, coefficients: Mapping[str, float]) -> exp.Expression:
    """intercept + sum of coefficient * term (+ the offset column), over the design table's columns.

    `coefficients` holds INTERCEPT ("(intercept)") and one entry per term of the layout; each becomes
    an exact DOUBLE literal.

    >>> layout = DesignLayout("design_m", "id", "y", ("age",))
    >>> linear_predictor(layout, {"(intercept)": -1.5, "age": 0.25}).sql(identify=True)
    'CAST(-1.5 AS DOUBLE) + CAST(0.25 AS DOUBLE) * "age"'
    """
    unknown = sorted(set(coefficients) - {INTERCEPT, *layout.terms})
    missing = [name for name in (INTERCEPT, *layout.terms) if name not in coefficients]
    if unknown or missing:
        raise ValueError(f"coefficients do not match the terms of {layout.table}: missing {missing}, unknown {unknown}")
    total: exp.Expression = number(coefficients[INTERCEPT])
    for term in layout.terms:
        total = exp.Add(this=total, expression=exp.Mul(this=number(coefficients[term]), expression=column(term)))
    if layout.offset:
        total = exp.Add(this=total, expression=column(layout.offset))
    return total


def prediction(family: str, eta: exp.Expression) -> exp.Expression:
    """The inverse link of any linear-predictor tree `eta`: the probability, expected count or mean.

    binomial 1 / (1 + EXP(-eta)) and poisson, gamma and tweedie EXP(eta), with eta clamped to [-700, 700]
    first; gaussian eta itself. A NULL eta gives NULL. A quasi family predicts as its base family.
    """
    family = sums_family(family) if family in FAMILIES else family
    if family == "gaussian":
        return eta.copy()
    if family == "poisson" or family in LOG_LINK:
        return exp.Exp(this=clamped(eta))
    if family == "binomial":
        denominator = exp.Add(this=number(1.0), expression=exp.Exp(this=exp.Neg(this=exp.Paren(this=clamped(eta)))))
        return exp.Div(this=number(1.0), expression=exp.Paren(this=denominator))
    raise ValueError(f"unknown family '{family}'; use one of {', '.join(FAMILIES)}")


def clamped(eta: exp.Expression) -> exp.Case:
    """`eta` limited to [-ETA_LIMIT, ETA_LIMIT] by CASE (GREATEST/LEAST treat NULL differently per engine)."""
    value = eta.copy() if isinstance(eta, (exp.Column, exp.Literal, exp.Paren, exp.Func)) else exp.Paren(this=eta.copy())
    return (
        exp.Case()
        .when(exp.GT(this=value.copy(), expression=number(ETA_LIMIT)), number(ETA_LIMIT))
        .when(exp.LT(this=value.copy(), expression=number(-ETA_LIMIT)), number(-ETA_LIMIT))
        .else_(value.copy())
    )


def scored_holdout(layout: DesignLayout, coefficients: Mapping[str, float], counted: bool = False) -> exp.Select:
    """The rows the holdout metrics read: key, observed target and linear predictor of every held-out
    complete row; with `counted` (frequency weights), also the rows each stands for as COUNTED.

    Every metric query takes such a rows query (columns KEY, OBSERVED, ETA and maybe COUNTED), so the
    same metrics can be computed on any labelled rows scored by a model, not only on a design table's holdout.
    """
    projections = [
        alias(column(layout.key), KEY),
        alias(column(layout.target), OBSERVED),
        alias(linear_predictor(layout, coefficients), ETA),
    ]
    if counted:
        projections.append(alias(column(layout.weight), COUNTED))
    return exp.select(*projections).from_(exp.to_table(layout.table)).where(holdout_rows(layout))


def with_prediction(rows: exp.Select, family: str, counted: bool = False) -> exp.Select:
    """`rows` (KEY, OBSERVED, ETA, maybe COUNTED) with the prediction through the family's inverse link as PREDICTED."""
    return _over(rows, "_linear", column(KEY), column(OBSERVED), column(ETA), alias(prediction(family, column(ETA)), PREDICTED),
                 *([column(COUNTED)] if counted else []))


def _counted(value: exp.Expression, counted: bool) -> exp.Expression:
    """A row's share of a sum: `value` itself, or times the rows it stands for."""
    return exp.Mul(this=column(COUNTED), expression=exp.Paren(this=value)) if counted else value


def binomial_summary_query(rows: exp.Select, threshold: float, counted: bool = False) -> exp.Select:
    """One row: rows, events, predicted events, true positives, twice the rank sum of the events,
    log-loss sum and squared-error (Brier) sum.

    A row is predicted an event when its probability is at least `threshold`. Ranks are over the
    predicted probability with ties given their average rank; twice that average, 2 * RANK() +
    (rows tied) - 1, is an integer, so the Mann-Whitney sum stays exact. The log loss of a row is
    max(eta, 0) - y * eta + LN(1 + EXP(-|eta|)), which equals -(y ln p + (1 - y) ln(1 - p)) but never
    takes the logarithm of 0 when p rounds to 0 or 1.

    With `counted` (frequency weights) every figure is that of the rows repeated: sums are weighted and
    twice a row's average rank among the repeated rows is 2 C - T + 1, C the weight of rows predicted
    at most as high and T that of the rows tied with it (2 RANK() + tied - 1 when every weight is 1).
    """
    y, eta, p = column(OBSERVED), column(ETA), column(PREDICTED)
    by_prediction = exp.Order(expressions=[exp.Ordered(this=column(PREDICTED))])
    if counted:
        through = exp.Window(this=exp.Sum(this=column(COUNTED)), order=by_prediction)  # RANGE frame: ties included
        tied = exp.Window(this=exp.Sum(this=column(COUNTED)), partition_by=[column(PREDICTED)])
        twice_rank = exp.Add(this=exp.Sub(this=exp.Mul(this=exp.Literal.number(2), expression=through), expression=tied),
                             expression=exp.Literal.number(1))
    else:
        rank = exp.Window(this=exp.Rank(), order=by_prediction)
        tied = exp.Window(this=exp.Count(this=exp.Star()), partition_by=[column(PREDICTED)])
        twice_rank = exp.Sub(this=exp.Add(this=exp.Mul(this=exp.Literal.number(2), expression=rank), expression=tied),
                             expression=exp.Literal.number(1))
    ranked = _over(with_prediction(rows, "binomial", counted), "_scored",
                   column(OBSERVED), column(ETA), column(PREDICTED), alias(twice_rank, TWICE_RANK),
                   *([column(COUNTED)] if counted else []))

    event = exp.EQ(this=y.copy(), expression=number(1.0))
    predicted_event = exp.GTE(this=p.copy(), expression=number(threshold))
    positive_part = exp.Case().when(exp.GT(this=eta.copy(), expression=number(0.0)), eta.copy()).else_(number(0.0))
    softplus_rest = exp.Ln(this=exp.Add(this=number(1.0), expression=exp.Exp(this=exp.Neg(this=exp.Abs(this=clamped(eta))))))
    log_loss = exp.Add(this=exp.Sub(this=positive_part, expression=exp.Mul(this=y.copy(), expression=eta.copy())),
                       expression=softplus_rest)
    error = exp.Paren(this=exp.Sub(this=p.copy(), expression=y.copy()))

    def count_if(condition: exp.Expression) -> exp.Expression:
        return exp.Sum(this=_counted(exp.Case().when(condition, exp.Literal.number(1)).else_(exp.Literal.number(0)), counted))

    return exp.select(
        alias(exp.Sum(this=column(COUNTED)) if counted else exp.Count(this=exp.Star()), ROWS),
        alias(count_if(event), "events"),
        alias(count_if(predicted_event), "predicted_events"),
        alias(count_if(exp.and_(predicted_event.copy(), event.copy())), "true_positives"),
        alias(exp.Sum(this=_counted(exp.Case().when(event.copy(), column(TWICE_RANK)).else_(exp.Literal.number(0)), counted)),
              "twice_rank_sum"),
        alias(exp.Sum(this=_counted(log_loss, counted)), "log_loss_sum"),
        alias(exp.Sum(this=_counted(exp.Mul(this=error, expression=error.copy()), counted)), "squared_error_sum"),
    ).from_(ranked.subquery("_ranked"))


def regression_summary_query(rows: exp.Select, family: str, counted: bool = False, power: float | None = None) -> exp.Select:
    """One row: rows, sums of observed and predicted, of |y - mu|, of (y - mu)^2 and of the unit deviance.

    Unit deviance: poisson (and quasipoisson) 2 (y ln(y / mu) - (y - mu)) with y ln(y / mu) = 0 at y = 0;
    gaussian (y - mu)^2; gamma and tweedie (variance `power`) as `families` writes them.
    """
    if family not in ("poisson", "quasipoisson", "gaussian", *LOG_LINK):
        raise ValueError(f"regression metrics are for poisson, gaussian, gamma or tweedie models, not '{family}'")
    y, mu = column(OBSERVED), column(PREDICTED)
    residual = exp.Paren(this=exp.Sub(this=y.copy(), expression=mu.copy()))
    squared = exp.Mul(this=residual, expression=residual.copy())
    if family in ("poisson", "quasipoisson"):
        ratio = exp.Div(this=y.copy(), expression=exp.Nullif(this=mu.copy(), expression=number(0.0)))
        y_log_ratio = (
            exp.Case()
            .when(exp.GT(this=y.copy(), expression=number(0.0)), exp.Mul(this=y.copy(), expression=exp.Ln(this=ratio)))
            .else_(number(0.0))
        )
        deviance = exp.Mul(this=number(2.0), expression=exp.Paren(this=exp.Sub(this=y_log_ratio, expression=residual.copy())))
    elif family in LOG_LINK:
        deviance = log_link_parts(family, power, y, clamped(column(ETA)))[2]
    else:
        deviance = squared.copy()
    return exp.select(
        alias(exp.Sum(this=column(COUNTED)) if counted else exp.Count(this=exp.Star()), ROWS),
        alias(exp.Sum(this=_counted(y.copy(), counted)), "observed_sum"),
        alias(exp.Sum(this=_counted(mu.copy(), counted)), "predicted_sum"),
        alias(exp.Sum(this=_counted(exp.Abs(this=residual.copy()), counted)), "absolute_error_sum"),
        alias(exp.Sum(this=_counted(squared, counted)), "squared_error_sum"),
        alias(exp.Sum(this=_counted(deviance, counted)), "deviance_sum"),
    ).from_(with_prediction(rows, family, counted).subquery("_scored"))


def calibration_query(rows: exp.Select, family: str, counted: bool = False) -> exp.Select:
    """Per decile of the prediction (NTILE(10) ordered by prediction, then key): rows, sum predicted, sum observed.

    Ordered by decile; a holdout of fewer than ten rows has fewer deciles. With `counted` the sums are
    weighted by the rows each stands for (the deciles still cut the distinct rows).
    """
    order = exp.Order(expressions=[exp.Ordered(this=column(PREDICTED)), exp.Ordered(this=column(KEY))])
    decile = exp.Window(this=exp.Ntile(this=exp.Literal.number(DECILES)), order=order)
    binned = _over(with_prediction(rows, family, counted), "_scored",
                   column(OBSERVED), column(PREDICTED), alias(decile, DECILE), *([column(COUNTED)] if counted else []))
    return (
        exp.select(
            alias(column(DECILE), "decile"),
            alias(exp.Sum(this=column(COUNTED)) if counted else exp.Count(this=exp.Star()), ROWS),
            alias(exp.Sum(this=_counted(column(PREDICTED), counted)), "predicted_sum"),
            alias(exp.Sum(this=_counted(column(OBSERVED), counted)), "observed_sum"),
        )
        .from_(binned.subquery("_binned"))
        .group_by(column(DECILE))
        .order_by(column(DECILE))
    )


def _over(inner: exp.Select, name: str, *projections: exp.Expression) -> exp.Select:
    return exp.select(*projections).from_(inner.subquery(name))
