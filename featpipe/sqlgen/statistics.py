"""The aggregate queries a GLM fit reads from a design table, and how to read their one row.

Everything is a SUM (or COUNT, MIN, MAX) over the training rows, so only a handful of numbers leave
the engine whatever the row count:

- `profile_query`: row count, target and weight sums, counts of target values outside the family's
  domain, and per term the sums of (x - shift) and (x - shift)^2, MIN and MAX. Shifting by a value
  near the mean (the caller passes the mean of a small sample) keeps the variance free of
  cancellation in one pass. (A fit that streams the rows gathers the same sums in numpy instead.)
- `statistics_query`: per IRLS step and per model, the deviance, X'WX (upper triangle, intercept
  first), the score X'W(z - eta) = sum of w (y - mu) x, the count of rows whose fitted value lies
  within 1e-10 of the family's boundary, and the Pearson chi2 sum of w (y - mu)^2 / V(mu). Terms enter standardized, (x - center) * (1 / scale), with
  the centers, scales and coefficients as exact DOUBLE literals. The score rather than X'Wz is
  returned because each step then solves for a small correction, which keeps digits that a
  solve for the whole coefficient vector from normal equations loses (X'Wz is X'WX beta + score).
- `target_counts_query`: weight per distinct target value (Poisson log-likelihood constant).
- `design_columns_query`: the raw design columns of the training rows, for a streamed fit.

Portability (the rules of sqlgen/harden.py): every column and literal is cast to DOUBLE; the linear predictor is clamped
with CASE before EXP; the only divisions and logarithms take an argument of at least 1 (1 + EXP(.))
or are guarded with CASE WHEN x > 0. The same tree runs on DuckDB, PostgreSQL, SQLite and Spark.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from sqlglot import exp

from ..compiler.layout import DesignLayout
from ..project import FAMILIES
from .common import alias, column, count_if, double, number, training_rows
from .families import LOG_LINK, log_link_parts, log_link_pearson, sums_family


@dataclass(frozen=True)
class TermProfile:
    """A term on the training rows: count, mean, sample sd (n - 1), min and max."""

    name: str
    count: int
    mean: float
    sd: float
    min: float
    max: float


@dataclass(frozen=True)
class TrainingProfile:
    """What a fit must know about the training rows before its first step."""

    rows: int
    weight_sum: float
    weighted_target_sum: float
    target_sum: float  # unweighted: events for binomial, total count for poisson
    target_min: float | None
    target_max: float | None
    weighted_offset_sum: float
    log_weight_sum: float  # sum of ln(w) over rows with w > 0 (0 without weights)
    not_binary: int  # target not 0 or 1
    negative: int  # target below 0
    not_integer: int  # target with a fractional part
    nonpositive_weights: int
    terms: tuple[TermProfile, ...]


@dataclass(frozen=True)
class ModelRequest:
    """One linear predictor to evaluate in a pass: a subset of terms and standardized coefficients."""

    terms: tuple[str, ...]
    beta: tuple[float, ...]  # intercept first, then one per term


def _training(layout: DesignLayout, projections: list[exp.Expression]) -> exp.Select:
    return exp.select(*projections).from_(exp.to_table(layout.table)).where(training_rows(layout))


def _sum(expression: exp.Expression) -> exp.Sum:
    return exp.Sum(this=expression)


def _value(name: str) -> exp.Expression:
    return double(column(name))


def _mul(*factors: exp.Expression) -> exp.Expression:
    product = factors[0]
    for factor in factors[1:]:
        product = exp.Mul(this=product, expression=factor)
    return product


def _add(*terms: exp.Expression) -> exp.Expression:
    total = terms[0]
    for term in terms[1:]:
        total = exp.Add(this=total, expression=term)
    return total


def _sub(left: exp.Expression, right: exp.Expression) -> exp.Expression:
    return exp.Sub(this=left, expression=exp.Paren(this=right))


def _case(condition: exp.Expression, then: exp.Expression, default: exp.Expression | None = None) -> exp.Case:
    return exp.Case(ifs=[exp.If(this=condition, true=then)], default=default)


def _positive_ln(value: exp.Expression) -> exp.Expression:
    return exp.Ln(this=_case(exp.GT(this=value, expression=number(0.0)), value))


def profile_query(layout: DesignLayout, shifts: Mapping[str, float]) -> exp.Select:
    """One pass over the training rows: counts, target/weight sums, domain counts, shifted term moments.

    Read the row with `read_profile`. `shifts` holds one value per term, ideally near its mean.
    """
    y = _value(layout.target)
    w = _value(layout.weight) if layout.weight else number(1.0)
    projections: list[exp.Expression] = [
        exp.Count(this=exp.Star()),
        _sum(w),
        _sum(_mul(w, y)),
        _sum(y),
        exp.Min(this=y),
        exp.Max(this=y),
        _sum(_mul(w, _value(layout.offset))) if layout.offset else number(0.0),
        _sum(_positive_ln(w)) if layout.weight else number(0.0),
        count_if(exp.and_(exp.NEQ(this=y, expression=number(0.0)), exp.NEQ(this=y, expression=number(1.0)))),
        count_if(exp.LT(this=y, expression=number(0.0))),
        count_if(exp.NEQ(this=y, expression=exp.Floor(this=y))),
        count_if(exp.LTE(this=w, expression=number(0.0))) if layout.weight else exp.Literal.number(0),
    ]
    for term in layout.terms:
        shifted = exp.Paren(this=exp.Sub(this=_value(term), expression=number(shifts[term])))
        projections += [_sum(shifted), _sum(_mul(shifted, shifted)), exp.Min(this=_value(term)), exp.Max(this=_value(term))]
    return _training(layout, projections)


PROFILE_HEAD = 12  # columns before the per-term block of `profile_query`


def read_profile(row: Sequence, layout: DesignLayout, shifts: Mapping[str, float]) -> TrainingProfile:
    """The `TrainingProfile` from the one row `profile_query` returns (empty sums read as 0)."""

    def num(value) -> float:
        return 0.0 if value is None else float(value)

    rows = int(row[0] or 0)
    terms = []
    for index, term in enumerate(layout.terms):
        shifted_sum, shifted_squares, low, high = row[PROFILE_HEAD + 4 * index : PROFILE_HEAD + 4 * index + 4]
        terms.append(term_profile(term, rows, shifts[term], num(shifted_sum), num(shifted_squares), low, high))
    return TrainingProfile(
        rows=rows,
        weight_sum=num(row[1]),
        weighted_target_sum=num(row[2]),
        target_sum=num(row[3]),
        target_min=None if row[4] is None else float(row[4]),
        target_max=None if row[5] is None else float(row[5]),
        weighted_offset_sum=num(row[6]),
        log_weight_sum=num(row[7]),
        not_binary=int(row[8] or 0),
        negative=int(row[9] or 0),
        not_integer=int(row[10] or 0),
        nonpositive_weights=int(row[11] or 0),
        terms=tuple(terms),
    )


def term_profile(name: str, rows: int, shift: float, shifted_sum: float, shifted_squares: float, low, high) -> TermProfile:
    """A term's profile from its sums of (x - shift) and (x - shift)^2 over `rows` rows."""
    if rows == 0:
        return TermProfile(name, 0, math.nan, math.nan, math.nan, math.nan)
    offset = shifted_sum / rows
    variance = max(shifted_squares / rows - offset * offset, 0.0)
    sd = math.sqrt(variance * rows / (rows - 1)) if rows > 1 else 0.0
    return TermProfile(name, rows, shift + offset, sd, float(low), float(high))


def upper_pairs(size: int) -> list[tuple[int, int]]:
    """Index pairs (i <= j) of the upper triangle, row by row: the order X'WX sums are returned in."""
    return [(i, j) for i in range(size) for j in range(i, size)]


def statistics_query(
    layout: DesignLayout,
    family: str,
    centers: Mapping[str, float],
    scales: Mapping[str, float],
    models: Sequence[ModelRequest],
    *,
    eta_limit: float | None,
    boundary_eta: float,
    group: exp.Expression | None = None,
    power: float | None = None,
    carry: Sequence[str] = (),
) -> exp.Select:
    """One pass computing, for each model: deviance, boundary rows, score (q), X'WX upper triangle.

    With `group` (an expression over the design table, e.g. a row's cross-validation fold) there is one
    row per group value, the value first, then the same sums over that group's rows.

    q = 1 + number of the model's terms; see `upper_pairs` for the triangle's order. Terms are
    standardized as (x - centers[t]) * (1 / scales[t]). The linear predictor is clamped to
    [-eta_limit, eta_limit] before EXP (None: no clamp), and a row whose |eta| exceeds `boundary_eta`
    (binomial; poisson: eta < -boundary_eta) counts as fitted at the boundary; glm.families sets both.
    `power` is the tweedie variance power (see `families`). `carry` names design columns passed through
    every level unchanged, so a caller can add its own sums over them to the same pass (`first_pass`).
    """
    if family not in FAMILIES:
        raise ValueError(f"unknown family {family}")
    family = sums_family(family)
    terms = sorted({term for model in models for term in model.terms}, key=layout.terms.index)
    x = {term: f"_x{index}" for index, term in enumerate(terms)}

    # Level 1: standardized terms, target, weight, offset.
    level = [alias(_value(layout.target), "_y")]
    if layout.weight:
        level.append(alias(_value(layout.weight), "_w"))
    carried = ["_y", "_w"] if layout.weight else ["_y"]
    if group is not None:
        level.append(alias(group, "_group"))
        carried.append("_group")
    level += [
        alias(_mul(exp.Paren(this=exp.Sub(this=_value(t), expression=number(centers[t]))), number(1.0 / scales[t])), x[t])
        for t in terms
    ]
    carried += [x[t] for t in terms]
    level += [column(name) for name in carry]
    carried += list(carry)
    offset = [_value(layout.offset)] if layout.offset else []
    query = _training(layout, level + ([alias(offset[0], "_o")] if offset else []))

    # Level 2: linear predictor of each model (raw, then clamped where EXP follows).
    etas = []
    for index, model in enumerate(models):
        parts = [number(model.beta[0])]
        parts += [_mul(number(b), column(x[t])) for t, b in zip(model.terms, model.beta[1:], strict=True)]
        if offset:
            parts.append(column("_o"))
        etas.append(alias(_add(*parts), f"_eta{index}"))
    query = _wrap(query, [column(c) for c in carried] + etas, "_rows")
    if eta_limit is not None:
        clamped = [alias(_clamp(column(f"_eta{index}"), eta_limit), f"_eta{index}") for index in range(len(models))]
        query = _wrap(query, [column(c) for c in carried] + clamped, "_linear")

    # Level 3: the fitted mean of each model, then its working weight, weighted residual, unit
    # deviance and boundary flag.
    if family != "gaussian":
        means = [alias(_mean(family, column(f"_eta{index}")), f"_mu{index}") for index in range(len(models))]
        query = _wrap(query, [column(c) for c in carried] + [column(f"_eta{i}") for i in range(len(models))] + means, "_fitted")
    y = column("_y")
    w = column("_w") if layout.weight else None
    per_row = []
    for index in range(len(models)):
        eta = column(f"_eta{index}")
        mu = eta if family == "gaussian" else column(f"_mu{index}")
        if family in LOG_LINK:  # the boundary of a log link is poisson's: eta < -boundary_eta
            boundary = _family_parts("poisson", y, eta, mu, boundary_eta)[3]
            weight, residual, deviance = log_link_parts(family, power, y, eta)
            pearson = log_link_pearson(family, power, y, eta)
        else:
            weight, residual, deviance, boundary = _family_parts(family, y, eta, mu, boundary_eta)
            pearson = pearson_part(family, y, mu)
        if w is not None:
            weight, residual, deviance = _mul(w, weight), _mul(w, exp.Paren(this=residual)), _mul(w, deviance)
            pearson = _mul(w.copy(), pearson)
        per_row += [
            alias(weight, f"_W{index}"),
            alias(residual, f"_R{index}"),
            alias(deviance, f"_D{index}"),
            alias(boundary, f"_B{index}"),
            alias(pearson, f"_P{index}"),
        ]
    grouping = [column("_group")] if group is not None else []
    query = _wrap(query, grouping + [column(x[t]) for t in terms] + [column(name) for name in carry] + per_row, "_working")

    # Level 4: the sums; each model's Pearson chi2 last, after every model's block.
    sums: list[exp.Expression] = []
    for index, model in enumerate(models):
        weight, residual = column(f"_W{index}"), column(f"_R{index}")
        design = [None] + [column(x[t]) for t in model.terms]  # None: the intercept column
        sums += [_sum(column(f"_D{index}")), _sum(column(f"_B{index}"))]
        sums += [_sum(residual if c is None else _mul(residual, c)) for c in design]
        for i, j in upper_pairs(len(design)):
            factors = [weight] + [c for c in (design[i], design[j]) if c is not None]
            sums.append(_sum(_mul(*factors)))
    sums += [_sum(column(f"_P{index}")) for index in range(len(models))]
    totals = exp.select(*grouping, *sums).from_(query.subquery("_statistics"))
    return totals.group_by(column("_group")) if group is not None else totals


def _wrap(inner: exp.Select, projections: list[exp.Expression], name: str) -> exp.Select:
    return exp.select(*projections).from_(inner.subquery(name))


def _clamp(value: exp.Expression, limit: float) -> exp.Case:
    """`value` limited to [-limit, limit] with CASE (GREATEST/LEAST treat NULL differently per engine)."""
    return exp.Case(
        ifs=[
            exp.If(this=exp.GT(this=value, expression=number(limit)), true=number(limit)),
            exp.If(this=exp.LT(this=value, expression=number(-limit)), true=number(-limit)),
        ],
        default=value.copy(),
    )


def _mean(family: str, eta: exp.Expression) -> exp.Expression:
    """The inverse link of a clamped linear predictor."""
    if family != "binomial":  # the log link
        return exp.Exp(this=eta)
    # binomial: 1 / (1 + EXP(-eta)); the denominator is at least 1, so it needs no NULLIF guard.
    return exp.Div(this=number(1.0), expression=exp.Paren(this=_add(number(1.0), exp.Exp(this=exp.Neg(this=eta)))))


def _family_parts(family: str, y: exp.Expression, eta: exp.Expression, mu: exp.Expression, boundary_eta: float):
    """Per-row (variance weight, y - mu, unit deviance, boundary 0/1) before prior weights."""
    zero, one, two = number(0.0), number(1.0), number(2.0)
    if family == "gaussian":
        residual = exp.Paren(this=_sub(y, mu))
        return one, _sub(y.copy(), mu.copy()), _mul(residual, residual.copy()), exp.Literal.number(0)
    flag = exp.LT(this=eta.copy(), expression=number(-boundary_eta))
    if family == "poisson":
        y_ln_y = _case(exp.GT(this=y.copy(), expression=zero), _mul(y.copy(), _positive_ln(y.copy())), zero.copy())
        deviance = _mul(two, exp.Paren(this=_sub(_add(_sub(y_ln_y, _mul(y.copy(), eta.copy())), mu.copy()), y.copy())))
        weight = mu.copy()
    else:
        weight = _mul(mu.copy(), exp.Paren(this=_sub(one, mu.copy())))
        # softplus(eta) = ln(1 + e^eta), written so EXP never sees a positive argument; LN's argument is >= 1.
        softplus = _case(
            exp.GT(this=eta.copy(), expression=zero),
            _add(eta.copy(), exp.Ln(this=_add(one.copy(), exp.Exp(this=exp.Neg(this=eta.copy()))))),
            exp.Ln(this=_add(one.copy(), exp.Exp(this=eta.copy()))),
        )
        deviance = _mul(two, exp.Paren(this=_sub(softplus, _mul(y.copy(), eta.copy()))))
        # A proportion (successes out of trials) adds its saturated term; 0 for a 0/1 target.
        inside = exp.and_(exp.GT(this=y.copy(), expression=zero.copy()), exp.LT(this=y.copy(), expression=one.copy()))
        failures = exp.Paren(this=_sub(one.copy(), y.copy()))
        saturated = _add(_mul(y.copy(), exp.Ln(this=y.copy())), _mul(failures, exp.Ln(this=failures.copy())))
        deviance = exp.Paren(this=_add(deviance, _case(inside, _mul(two.copy(), exp.Paren(this=saturated)), zero.copy())))
        flag = exp.or_(flag, exp.GT(this=eta.copy(), expression=number(boundary_eta)))
    return weight, _sub(y.copy(), mu.copy()), deviance, _case(flag, exp.Literal.number(1), exp.Literal.number(0))


def pearson_part(family: str, y: exp.Expression, mu: exp.Expression) -> exp.Expression:
    """(y - mu)^2 / V(mu), a row's Pearson chi2 before its prior weight (NULL, so left out of the SUM, where
    V(mu) is 0 in floating point)."""
    residual = exp.Paren(this=_sub(y.copy(), mu.copy()))
    squared = _mul(residual, residual.copy())
    if family == "gaussian":
        return squared
    variance = mu.copy() if family == "poisson" else _mul(mu.copy(), exp.Paren(this=_sub(number(1.0), mu.copy())))
    return exp.Div(this=squared, expression=exp.Nullif(this=variance, expression=number(0.0)))


def target_counts_query(layout: DesignLayout) -> exp.Select:
    """Total prior weight per distinct target value on the training rows."""
    y = _value(layout.target)
    weight = _sum(_value(layout.weight)) if layout.weight else exp.Count(this=exp.Star())
    return _training(layout, [alias(y, "_y"), weight]).group_by(exp.Literal.number(1))


def design_columns_query(layout: DesignLayout, limit: int | None = None, ordered: bool = False) -> exp.Select:
    """Target, offset, weight (when the model has them) and terms of the training rows, as DOUBLE.

    `ordered` sorts by the key so that LIMIT picks the same rows on engines without a stable scan
    order; DuckDB keeps insertion order, so there a plain LIMIT is already deterministic.
    """
    names = [("_y", layout.target)]
    if layout.offset:
        names.append(("_o", layout.offset))
    if layout.weight:
        names.append(("_w", layout.weight))
    projections = [alias(_value(source), name) for name, source in names]
    projections += [alias(_value(term), term) for term in layout.terms]
    query = _training(layout, projections)
    if ordered:
        query = query.order_by(column(layout.key))
    return query.limit(limit) if limit is not None else query
