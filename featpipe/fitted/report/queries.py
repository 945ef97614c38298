"""The report's SQL, as sqlglot trees: scored input rows, their ranges, samples and bins, and grid tables.

Everything the report draws comes from the model's own scoring query (featpipe.sqlgen.score) run in
the engine, so the pictures show what production computes. The rows table joins each input row to
its score and marks the rows the fit used:

    key, the input columns the report needs, _observed (the target as DOUBLE), _holdout (the design
    table's hash split, same salt and fraction), _prediction, _complete (scored 'ok' with a target,
    and a weight when the model has one)

so training rows are `NOT _holdout AND _complete` and held-out rows `_holdout AND _complete`, exactly
the design table's split. Samples are ordered by an MD5 of the key (then the key), so they are the
same on every run and engine without a random number.

>>> from sqlglot import exp
>>> types = {"lease_id": "BIGINT", "firm_age_years": "DOUBLE", "sector": "VARCHAR"}
>>> print(grid_query("lease_id", "BIGINT", types, [("firm_age_years", [2.5])], {"sector": "retail"}).sql("duckdb"))
SELECT CAST(0 + _i0 * 1 AS BIGINT) AS "lease_id", CAST(_v0 AS DOUBLE) AS "firm_age_years", CAST('retail' AS TEXT) AS "sector" FROM (VALUES (0, CAST(2.5 AS DOUBLE))) AS _axis0(_i0, _v0)
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

from sqlglot import exp

from ...project import Holdout, InputSpec
from ...project.names import PREDICTION, ROWS, STATUS
from ...sqlgen.common import alias, column, count_if, number
from ...sqlgen.design import holdout_flag, target_value
from ...sqlgen.families import LOG_LINK, log_link_parts
from ...sqlgen.score import OK, score_query
from .. import FittedModel
from ..scoring import scoring_model

OBSERVED, HOLDOUT, PREDICTED, COMPLETE = "_observed", "_holdout", "_prediction", "_complete"
SAMPLE_SALT = "featpipe-report:"
INPUT, SCORED = "_input", "_scored"
PERCENTILES = (0.01, 0.5, 0.99)
SCORE_BINS = 1000  # predictions are counted in bins of 1/1000 for the ROC curve and class histograms
DECILES = 10


def rows_query(fitted: FittedModel, source: InputSpec, columns: Sequence[str]) -> exp.Select:
    """Every input row with `columns`, its observed target, holdout flag, prediction and completeness."""
    key = fitted.key
    complete = exp.and_(
        column(STATUS, SCORED).eq(exp.Literal.string(OK)),
        column(fitted.target, INPUT).is_(exp.null()).not_(),
        *([column(fitted.weight_column, INPUT).is_(exp.null()).not_()] if fitted.weights else []),
    )
    observed = target_value(fitted.target, source.columns[fitted.target])
    for reference in observed.find_all(exp.Column):
        reference.set("table", exp.to_identifier(INPUT, quoted=True))
    flag = holdout_flag(key, Holdout.from_record(fitted.holdout))
    for reference in flag.find_all(exp.Column):
        reference.set("table", exp.to_identifier(INPUT, quoted=True))
    return (
        exp.select(
            alias(column(key, INPUT), key),
            *(alias(column(name, INPUT), name) for name in columns if name != key),
            alias(observed, OBSERVED),
            alias(flag, HOLDOUT),
            alias(column(PREDICTION, SCORED), PREDICTED),
            alias(complete, COMPLETE),
        )
        .from_(exp.to_table(source.name).as_(exp.to_identifier(INPUT, quoted=True)))
        .join(
            score_query(scoring_model(fitted), table=source.name).subquery(exp.to_identifier(SCORED, quoted=True)),
            on=column(key, INPUT).eq(column(key, SCORED)),
        )
    )


def training() -> exp.Expression:
    return exp.and_(exp.not_(column(HOLDOUT)), column(COMPLETE))


def held_out() -> exp.Expression:
    return exp.and_(column(HOLDOUT), column(COMPLETE))


def counts_query(table: str) -> exp.Select:
    """One row: training rows and held-out rows of a rows table."""
    return exp.select(
        alias(count_if(training()), "train"),
        alias(count_if(held_out()), "holdout"),
    ).from_(exp.to_table(table))


def ranges_query(table: str, numeric: Sequence[str]) -> exp.Select:
    """One row over the training rows: per numeric column its min, 1st percentile, median, 99th percentile, max."""
    projections = []
    for index, name in enumerate(numeric):
        value = exp.cast(column(name), "DOUBLE")
        projections += [
            alias(exp.Min(this=value.copy()), f"_min{index}"),
            *(alias(_percentile(value, share), f"_p{index}_{position}") for position, share in enumerate(PERCENTILES)),
            alias(exp.Max(this=value.copy()), f"_max{index}"),
        ]
    return exp.select(*projections).from_(exp.to_table(table)).where(training())


def levels_query(table: str, name: str, limit: int) -> exp.Select:
    """The most frequent non-NULL values of a column among training rows, with their counts."""
    count = exp.Count(this=exp.Star())
    return (
        exp.select(alias(column(name), "value"), alias(count, ROWS))
        .from_(exp.to_table(table))
        .where(exp.and_(training(), column(name).is_(exp.null()).not_()))
        .group_by(column(name))
        .order_by(exp.Ordered(this=count.copy(), desc=True), exp.Ordered(this=column(name)))
        .limit(limit)
    )


def sample_query(table: str, key: str, columns: Sequence[str], where: exp.Expression, rows: int) -> exp.Select:
    """Up to `rows` rows matching `where`, in the order of an MD5 of their key: a fixed pseudo-random sample."""
    keyed = exp.DPipe(this=exp.Literal.string(SAMPLE_SALT), expression=exp.cast(column(key), "VARCHAR"), safe=True)
    return (
        exp.select(*(column(name) for name in columns))
        .from_(exp.to_table(table))
        .where(where)
        .order_by(exp.Ordered(this=exp.MD5(this=keyed)), exp.Ordered(this=column(key)))
        .limit(rows)
    )


def score_bins_query(table: str) -> exp.Select:
    """Held-out rows per bin of the prediction (bin b holds b/1000 <= p < (b+1)/1000): rows and events."""
    scaled = exp.Mul(this=column(PREDICTED), expression=number(float(SCORE_BINS)))
    bin_ = exp.cast(exp.Floor(this=scaled), "BIGINT")
    return (
        exp.select(alias(bin_, "bin"), alias(exp.Count(this=exp.Star()), ROWS), alias(exp.Sum(this=column(OBSERVED)), "events"))
        .from_(exp.to_table(table))
        .where(held_out())
        .group_by(bin_.copy())
        .order_by(exp.Ordered(this=bin_.copy()))
    )


def residual_deciles_query(table: str, key: str, family: str, power: float | None = None) -> exp.Select:
    """Per decile of the prediction among held-out rows (NTILE(10) by prediction, then key, as the fit's
    calibration): rows, mean predicted, mean observed, and the 10th, 25th, 50th, 75th and 90th percentiles
    of the deviance residual sign(y - mu) * sqrt(unit deviance).

    Unit deviance: poisson 2 (y ln(y / mu) - (y - mu)) with y ln(y / mu) = 0 at y = 0; gamma and tweedie
    (variance `power`) as `sqlgen.families` writes them, at eta = ln mu; gaussian (y - mu)^2, whose deviance
    residual is y - mu itself.
    """
    y, mu = column(OBSERVED), column(PREDICTED)
    difference = exp.Paren(this=exp.Sub(this=y.copy(), expression=mu.copy()))
    if family in ("poisson", "quasipoisson", *LOG_LINK):
        if family in LOG_LINK:
            eta = exp.Ln(this=exp.Case().when(exp.GT(this=mu.copy(), expression=number(0.0)), mu.copy()))
            unit = log_link_parts(family, power, y, eta)[2]
        else:
            ratio = exp.Div(this=y.copy(), expression=exp.Nullif(this=mu.copy(), expression=number(0.0)))
            y_log_ratio = exp.Case().when(exp.GT(this=y.copy(), expression=number(0.0)), exp.Mul(this=y.copy(), expression=exp.Ln(this=ratio))).else_(number(0.0))
            unit = exp.Mul(this=number(2.0), expression=exp.Paren(this=exp.Sub(this=y_log_ratio, expression=difference.copy())))
        size = exp.Case().when(exp.GT(this=unit.copy(), expression=number(0.0)), exp.Sqrt(this=unit)).else_(number(0.0))
        sign = (exp.Case().when(exp.GT(this=y.copy(), expression=mu.copy()), number(1.0))
                .when(exp.LT(this=y.copy(), expression=mu.copy()), number(-1.0)).else_(number(0.0)))
        residual: exp.Expression = exp.Mul(this=sign, expression=size)
    elif family == "gaussian":
        residual = difference
    else:
        raise ValueError(f"deviance residuals by decile are for poisson, gamma, tweedie or gaussian models, not '{family}'")
    order = exp.Order(expressions=[exp.Ordered(this=column(PREDICTED)), exp.Ordered(this=column(key))])
    decile = exp.Window(this=exp.Ntile(this=exp.Literal.number(DECILES)), order=order)
    binned = exp.select(
        alias(decile, "_decile"), column(PREDICTED), column(OBSERVED), alias(residual, "_residual")
    ).from_(exp.to_table(table)).where(held_out())
    rows = exp.Count(this=exp.Star())
    return (
        exp.select(
            column("_decile"),
            alias(rows, ROWS),
            alias(exp.Avg(this=column(PREDICTED)), "mean_predicted"),
            alias(exp.Avg(this=column(OBSERVED)), "mean_observed"),
            *(alias(_percentile(column("_residual"), share), f"_q{int(share * 100)}") for share in (0.1, 0.25, 0.5, 0.75, 0.9)),
        )
        .from_(binned.subquery("_binned"))
        .group_by(column("_decile"))
        .order_by(column("_decile"))
    )


def shared_rows_query(table: str, key: str, other: exp.Select, held: bool = False) -> exp.Select:
    """One row: training rows (held-out rows when `held`) of this rows table, of `other` (another model's
    rows query), and of both."""
    mine, theirs = (exp.and_(column(HOLDOUT, side) if held else exp.not_(column(HOLDOUT, side)), column(COMPLETE, side))
                    for side in ("_a", "_b"))
    return exp.select(
        alias(count_if(mine), "this"),
        alias(count_if(theirs), "other"),
        alias(count_if(exp.and_(mine.copy(), theirs.copy())), "both"),
    ).from_(exp.to_table(table).as_(exp.to_identifier("_a", quoted=True))).join(
        other.subquery(exp.to_identifier("_b", quoted=True)), on=column(key, "_a").eq(column(key, "_b")), join_type="FULL OUTER"
    )


FIRST_SCORE, SECOND_SCORE = "_first_score", "_second_score"


def paired_scores_query(table: str, key: str, other: exp.Select) -> exp.Select:
    """The rows held out and complete for both this rows table and `other`: the observed target and both
    models' predictions (FIRST_SCORE, SECOND_SCORE)."""
    both = exp.and_(*(exp.and_(column(HOLDOUT, side), column(COMPLETE, side)) for side in ("_a", "_b")))
    return (
        exp.select(alias(column(OBSERVED, "_a"), OBSERVED), alias(column(PREDICTED, "_a"), FIRST_SCORE),
                   alias(column(PREDICTED, "_b"), SECOND_SCORE))
        .from_(exp.to_table(table).as_(exp.to_identifier("_a", quoted=True)))
        .join(other.subquery(exp.to_identifier("_b", quoted=True)), on=column(key, "_a").eq(column(key, "_b")))
        .where(both)
    )


def grid_query(
    key: str, key_type: str, types: Mapping[str, str], axes: Sequence[tuple[str, Sequence]], held: Mapping[str, object],
    first_key: int = 0,
) -> exp.Select:
    """A grid as a table of the input's shape: every combination of the `axes` values (the first axis
    varying fastest), the other columns in `held` at their held value and the rest of `types` NULL,
    each CAST to its contract type. Row keys count from `first_key` in that order.
    """
    key_value: exp.Expression = exp.Literal.number(first_key)
    sources, stride = [], 1
    for index, (_, values) in enumerate(axes):
        position, value = f"_i{index}", f"_v{index}"
        sources.append(exp.values([(exp.Literal.number(i), literal(v)) for i, v in enumerate(values)],
                                  alias=f"_axis{index}", columns=[position, value]))
        key_value = exp.Add(this=key_value, expression=exp.Mul(this=exp.column(position), expression=exp.Literal.number(stride)))
        stride *= len(values)
    varying = [name for name, _ in axes]
    projections = [alias(exp.cast(key_value, exp.DataType.build(key_type, dialect="duckdb")), key)]
    for name, kind in types.items():
        if name == key:
            continue
        value = exp.column(f"_v{varying.index(name)}") if name in varying else literal(held.get(name))
        projections.append(alias(exp.cast(value, exp.DataType.build(kind, dialect="duckdb")), name))
    query = exp.select(*projections).from_(sources[0])
    for source in sources[1:]:
        query = query.join(source, join_type="CROSS")
    return query


def union_all(queries: Sequence[exp.Select]) -> exp.Query:
    combined: exp.Query = queries[0]
    for query in queries[1:]:
        combined = exp.union(combined, query, distinct=False)
    return combined


def grid_scores_query(fitted: FittedModel, grid: str, columns: Sequence[str]) -> exp.Select:
    """The grid's `columns` and the model's prediction on each grid row, by key (the model's own scoring SQL)."""
    key = fitted.key
    return (
        exp.select(alias(column(key, "_g"), key), *(alias(column(name, "_g"), name) for name in columns if name != key),
                   alias(column(PREDICTION, SCORED), PREDICTION))
        .from_(exp.to_table(grid).as_(exp.to_identifier("_g", quoted=True)))
        .join(score_query(scoring_model(fitted), table=grid).subquery(exp.to_identifier(SCORED, quoted=True)),
              on=column(key, "_g").eq(column(key, SCORED)))
        .order_by(column(key, "_g"))
    )


def literal(value) -> exp.Expression:
    """A Python value as a SQL literal: numbers as exact DOUBLE casts, text as strings, None as NULL."""
    if value is None:
        return exp.null()
    if isinstance(value, bool):
        return exp.Boolean(this=value)
    if isinstance(value, (int, float)) and math.isfinite(value):
        return number(value)
    return exp.Literal.string(str(value))


def _percentile(value: exp.Expression, share: float) -> exp.Expression:
    return exp.WithinGroup(
        this=exp.PercentileCont(this=exp.Literal.number(repr(share))),
        expression=exp.Order(expressions=[exp.Ordered(this=value.copy())]),
    )
