"""Holdout metrics and training profiles of a fitted model, computed by aggregate queries in the engine.

Only a handful of rows come back: one summary row, at most ten calibration rows, and per profiled
column one moments row and at most eleven order-statistic rows. Counts arrive as exact integers and
every ratio is formed here from them, so the metrics are the same on every engine; nothing is rounded.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

from sqlglot import exp

from ..compiler.layout import DesignLayout
from ..engines.base import Engine
from ..fitted import Profile
from ..sqlgen.metrics import (
    binomial_summary_query,
    calibration_query,
    regression_summary_query,
)
from ..sqlgen.profile import (
    moments_query,
    order_statistics_query,
    read_order_statistics,
    read_profiles,
)


def holdout_metrics(
    engine: Engine, layout: DesignLayout, family: str, coefficients: Mapping[str, float], threshold: float,
    counted: bool = False, power: float | None = None,
) -> dict:
    """Metrics of the model `coefficients` on the held-out complete rows, unweighted (variance weights are
    a fitting device; a metric counts each held-out row once), or with `counted` (frequency weights) as
    the rows the weights stand for: every count and sum is that of the rows repeated.

    binomial: rows, events, accuracy (predicted an event when the probability is >= `threshold`),
    baseline_accuracy (always predicting the holdout's majority class), precision, recall, auc
    (Mann-Whitney with average ranks for tied probabilities), log_loss, brier, calibration.
    poisson, gaussian, gamma and tweedie (`power`): rows, deviance (the family's, summed), mean_absolute_error, rmse,
    mean_observed, mean_predicted, calibration.
    calibration: one entry per decile of the prediction, {decile, rows, mean_predicted, mean_observed}.
    A ratio with a zero denominator (precision without predicted events, recall without events, AUC
    with one class only) is None. With no held-out rows (holdout fraction 0) the result is {"rows": 0}.
    """
    if family in ("binomial", "quasibinomial"):
        metrics = _binomial(engine.fetch(binomial_summary_query(layout, coefficients, threshold, counted))[0])
    else:
        metrics = _regression(engine.fetch(regression_summary_query(layout, family, coefficients, counted, power))[0])
    if metrics["rows"] == 0:
        return {"rows": 0}
    metrics["calibration"] = [
        {"decile": int(decile), "rows": int(rows), "mean_predicted": float(predicted) / int(rows),
         "mean_observed": float(observed) / int(rows)}
        for decile, rows, predicted, observed in engine.fetch(calibration_query(layout, family, coefficients, counted))
    ]
    return metrics


def _ratio(numerator: int, denominator: int) -> float | None:
    return numerator / denominator if denominator else None


def _binomial(row: tuple) -> dict:
    rows = int(row[0] or 0)  # a SUM over no rows is NULL
    if rows == 0:
        return {"rows": 0}
    events, predicted_events, true_positives, twice_rank_sum = (int(value) for value in row[1:5])
    log_loss_sum, squared_error_sum = float(row[5]), float(row[6])
    non_events = rows - events
    correct = true_positives + (non_events - (predicted_events - true_positives))
    # Mann-Whitney: AUC = (R - n1 (n1 + 1) / 2) / (n1 n0), R the rank sum of the events; with 2R exact.
    auc_numerator = twice_rank_sum - events * (events + 1)
    return {
        "rows": rows,
        "events": events,
        "accuracy": correct / rows,
        "baseline_accuracy": max(events, non_events) / rows,
        "precision": _ratio(true_positives, predicted_events),
        "recall": _ratio(true_positives, events),
        "auc": _ratio(auc_numerator, 2 * events * non_events),
        "log_loss": log_loss_sum / rows,
        "brier": squared_error_sum / rows,
    }


def _regression(row: tuple) -> dict:
    rows = int(row[0] or 0)  # a SUM over no rows is NULL
    if rows == 0:
        return {"rows": 0}
    observed_sum, predicted_sum, absolute_sum, squared_sum, deviance_sum = (float(value) for value in row[1:6])
    return {
        "rows": rows,
        "deviance": deviance_sum,
        "mean_absolute_error": absolute_sum / rows,
        "rmse": math.sqrt(squared_sum / rows),
        "mean_observed": observed_sum / rows,
        "mean_predicted": predicted_sum / rows,
    }


def training_profiles(engine: Engine, layout: DesignLayout, columns: Mapping[str, exp.Expression]) -> dict[str, Profile]:
    """A `Profile` per entry of `columns` (a name -> an expression over the design table, e.g. each term
    and "linear_predictor"), over every row that is not held out, complete or not: `nulls` counts that
    column's NULLs there, the other figures describe its non-NULL values. Two queries for all columns:
    the order statistics first, whose medians then centre the one-scan moments.
    Quantile rule and median: see featpipe.sqlgen.profile.
    """
    if not columns:
        return {}
    names = list(columns)
    order = read_order_statistics(names, engine.fetch(order_statistics_query(layout, columns)))
    shifts = {name: order[name].median() or 0.0 for name in names}
    (moments,) = engine.fetch(moments_query(layout, columns, shifts))
    return read_profiles(names, order, moments)
