"""The report as one self-contained HTML page: a Jinja2 template, figures as inline SVG, SQL highlighted
with Pygments (its styles written into the page), and the effect-curve numbers as a JSON block.

Numbers are formatted in one place, `metric_text` and `number_text`, so a test can format a fitted
file's values the same way and find them in the page.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import jinja2
from markupsafe import Markup
from pygments import highlight
from pygments.formatters import HtmlFormatter
from pygments.lexers import SqlLexer

from .. import FittedModel
from ..drift_history import DriftHistory
from ..evaluations import Evaluation, stability_row
from ..notes import figure
from . import groups, history, plots, readings
from .compare import Comparison, coefficient_count
from .data import INTEGER, LEVELS, ReportData, roc_points

CURVES_ID = "effect-curves"
HISTOGRAM_BINS = 40
METRICS = {
    "binomial": (
        ("accuracy", "accuracy at the threshold"),
        ("baseline_accuracy", "baseline accuracy (majority class)"),
        ("precision", "precision"),
        ("recall", "recall"),
        ("auc", "AUC"),
        ("auc_low", "AUC 95% interval, lower end (DeLong)"),
        ("auc_high", "AUC 95% interval, upper end (DeLong)"),
        ("gini", "Gini (2 × AUC − 1)"),
        ("ks", "KS statistic"),
        ("ks_score", "predicted probability at the KS gap"),
        ("log_loss", "log loss"),
        ("brier", "Brier score"),
        ("calibration_intercept", "calibration intercept (0 when calibrated)"),
        ("calibration_slope", "calibration slope (1 when calibrated)"),
    ),
    "regression": (
        ("deviance", "deviance (sum over held-out rows)"),
        ("mean_absolute_error", "mean absolute error"),
        ("rmse", "root mean squared error"),
        ("mean_observed", "mean observed"),
        ("mean_predicted", "mean predicted"),
        ("calibration_intercept", "calibration intercept (0 when calibrated)"),
        ("calibration_slope", "calibration slope (1 when calibrated)"),
    ),
}
GAINS = (("rows", "rows"), ("events", "events"), ("event_rate", "event rate"),
         ("cumulative_event_share", "share of all events caught"), ("lift", "lift"))
FIT_FIGURES = (
    ("log_likelihood", "log-likelihood"),
    ("deviance", "deviance"),
    ("null_deviance", "null deviance"),
    ("aic", "AIC"),
    ("bic", "BIC"),
)
CAUTIONS = (
    ("Decision support, not decision.",
     "A score is one input to a decision that a trained person makes and can explain. Give people the reasons behind "
     "a decision about them and a way to contest it, and record why a decision went against the score."),
    ("Protected characteristics and proxies need review.",
     "Before use, review every input and term for protected characteristics (such as age, sex, ethnicity, religion or "
     "disability) and for inputs that can stand in for them (such as location, firm age or sector), and check the "
     "model's errors across the groups concerned."),
    ("Local law and model-risk policy govern use.",
     "Credit, insurance, employment and housing decisions are regulated in many places. The organisation's model-risk "
     "policy decides validation, approval, monitoring for drift and when the model must be fitted again; the holdout "
     "figures here describe past data only."),
)


def metric_text(value) -> str:
    """A metric or fit figure as the report prints it: whole numbers with separators, others to 4 decimals."""
    if value is None:
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    return f"{value:,.2f}" if abs(value) >= 1000 else f"{value:.4f}"


def number_text(value, digits: int = 4) -> str:
    """A coefficient-table number: `digits` significant digits."""
    return "" if value is None else f"{value:.{digits}g}"


@dataclass(frozen=True)
class Sources:
    """Where the report came from, printed in its header and footer."""

    fitted_hash: str
    other_hash: str | None
    engine: str
    warnings: tuple[str, ...]
    other_warnings: tuple[str, ...] = ()
    evaluations: tuple[Evaluation, ...] = ()  # fitted/MODEL.evaluations/*.yaml
    drift_history: DriftHistory | None = None  # fitted/MODEL.drift.yaml


def render_report(data: ReportData, sources: Sources, comparison: Comparison | None) -> str:
    fitted, other = data.fitted, data.other
    models = [fitted] + ([other] if other else [])
    formatter = HtmlFormatter(cssclass="sql")
    context = {
        "fitted": fitted,
        "other": other,
        "sources": sources,
        "summary": readings.summary(fitted, data.figures, sources.warnings),
        "rows": _rows(fitted),
        "metrics": _metrics(fitted),
        "validation": _validation(fitted, sources),
        "offset_html": Markup(highlight(fitted.offset, SqlLexer(), formatter)) if fitted.offset else None,
        "comparison": _comparison(fitted, other, comparison) if other else None,
        "coefficients": _coefficients(fitted),
        "coefficients_reading": readings.coefficients(fitted),
        "interval_svg": Markup(plots.interval_plot(fitted, "intervals")),
        "terms_reading": readings.terms(fitted),
        "terms": [_term(term, formatter, data.learned.get(term.name)) for term in fitted.model_terms],
        "curves_reading": readings.curves(fitted, data.curves, data.held, other),
        "curves": [_curve(curve, models, data.held, index) for index, curve in enumerate(data.curves)],
        "surface_reading": readings.surface(fitted, data.surface, data.surface_note, other),
        "surface_svg": Markup(plots.surface_plot(data.surface, models, "surface")) if data.surface else None,
        "surface_points": len(data.surface.points) if data.surface else 0,
        "performance_reading": readings.performance(fitted, data.figures),
        "performance": _performance(data),
        "gains": _gains(fitted),
        "gains_columns": GAINS,
        "cautions_reading": readings.cautions(fitted, data.inputs),
        "cautions": CAUTIONS,
        "group_tables": groups.group_tables(fitted, sources.evaluations, sources.fitted_hash),
        "group_reading": groups.reading(fitted),
        "group_columns": groups.COLUMNS,
        "history_svg": Markup(history.history_plot(sources.drift_history, "drift-history")) if sources.drift_history else None,
        "history_rows": history.history_rows(sources.drift_history) if sources.drift_history else [],
        "history_columns": history.COLUMNS,
        "pygments_css": Markup(formatter.get_style_defs(".sql")),
        "curves_json": Markup(_curves_json(data)),
        "curves_id": CURVES_ID,
        "metric_text": metric_text,
    }
    return _environment().get_template("report.html.j2").render(**context)


def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.PackageLoader("featpipe.fitted.report", "templates"),
        autoescape=jinja2.select_autoescape(["html", "j2"]),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def _rows(fitted: FittedModel) -> list[tuple[str, str]]:
    rows = fitted.rows
    shown = [("input rows", metric_text(rows["input"])), ("complete rows", metric_text(rows["complete"])),
             ("training rows", metric_text(rows["train"])), ("held-out rows", metric_text(rows["holdout"]))]
    shown += [(f"dropped: {reason}", metric_text(count)) for reason, count in rows.get("dropped", {}).items()]
    holdout = fitted.holdout
    if "column" in holdout:
        shown.append(("held out (out of time)", f"{holdout['column']} on or after {holdout['from']}"))
    else:
        shown.append(("held out (hash of the key)", f"{holdout['fraction']:.0%}"))
    return shown


def _validation(fitted: FittedModel, sources: Sources) -> list[tuple[str, ...]]:
    """The stability table: the holdout, the cross-validation folds and each labelled table evaluated (by
    period when evaluated so); rows, AUC (binomial), mean observed, mean predicted and their ratio."""
    batches = [("holdout", fitted.metrics)] if fitted.metrics.get("rows") else []
    batches += [(f"cross-validation fold {item['fold']} of {fitted.crossval['folds']}", item["metrics"])
                for item in fitted.crossval.get("per_fold", ())]
    for evaluation in sources.evaluations:
        earlier = "" if evaluation.fitted == sources.fitted_hash else " (of an earlier fit)"
        batches.append((f"table {evaluation.table}{earlier}", evaluation.metrics))
        batches += [(f"table {evaluation.table}, {evaluation.by} {item['period']}", item["metrics"]) for item in evaluation.periods]
    rows = []
    for label, metrics in batches:
        row = stability_row(metrics)
        rows.append((label, metric_text(row["rows"]), metric_text(row["auc"]), metric_text(row["mean_observed"]),
                     metric_text(row["mean_predicted"]), metric_text(row["observed_to_predicted"])))
    return rows


def _metric_names(family: str):
    return METRICS["binomial" if family in ("binomial", "quasibinomial") else "regression"]


def _metrics(fitted: FittedModel) -> list[tuple[str, str, str]]:
    if not fitted.metrics.get("rows"):
        return []
    return [(key, label, metric_text(fitted.metrics.get(key))) for key, label in _metric_names(fitted.family)]


def _comparison(fitted: FittedModel, other: FittedModel, comparison: Comparison) -> dict:
    metrics = [(key, label, metric_text(fitted.metrics.get(key)), metric_text(other.metrics.get(key)))
               for key, label in _metric_names(fitted.family)]
    if fitted.family == "binomial":
        metrics.append(("threshold", "threshold of accuracy, precision and recall", metric_text(fitted.threshold),
                        metric_text(other.threshold)))
    fit = [(key, label, metric_text(fitted.fit.get(key)), metric_text(other.fit.get(key))) for key, label in FIT_FIGURES]
    fit.insert(0, ("coefficients", "coefficients", metric_text(coefficient_count(fitted)), metric_text(coefficient_count(other))))
    fit.insert(1, ("train", "training rows", metric_text(fitted.rows["train"]), metric_text(other.rows["train"])))
    test, f_test, auc_test = comparison.likelihood_ratio, comparison.f_test, comparison.auc_test
    return {"reading": readings.comparison(fitted, other, comparison), "metrics": metrics, "fit": fit, "test": test,
            "statistic": metric_text(test.statistic) if test.statistic is not None else None,
            "p_value": f"{test.p_value:.3g}" if test.p_value is not None else None,
            "f_test": f_test, "f_statistic": metric_text(f_test.statistic) if f_test else None,
            "f_p_value": f"{f_test.p_value:.3g}" if f_test else None,
            "auc_test": auc_test, "auc_difference": metric_text(auc_test.difference) if auc_test else None,
            "auc_z": metric_text(auc_test.z) if auc_test else None,
            "auc_p_value": f"{auc_test.p_value:.3g}" if auc_test else None,
            "thresholds": comparison.thresholds, "left_out": comparison.left_out}


def _gains(fitted: FittedModel) -> list[dict]:
    """The lift / gains table as printed: one row per decile of the prediction, the highest first."""
    return [{"decile": entry["decile"], **{key: metric_text(entry[key]) for key, _ in GAINS}}
            for entry in fitted.metrics.get("gains") or []]


def _coefficients(fitted: FittedModel) -> list[dict]:
    rows = []
    for term in fitted.terms:
        effect = term.effect
        rows.append({
            "name": term.name,
            "estimate": number_text(term.estimate),
            "std_error": number_text(term.std_error),
            "statistic": number_text(term.statistic, 3),
            "p_value": number_text(term.p_value, 2),
            "interval": "" if term.ci_low is None else f"{number_text(term.ci_low)} to {number_text(term.ci_high)}",
            "effect": "" if effect is None else f"{number_text(effect.value, 3)} per {effect.step:g}",
            "effect_interval": "" if effect is None or effect.low is None
            else f"{number_text(effect.low, 3)} to {number_text(effect.high, 3)}",
            "vif": number_text(term.vif, 3),
        })
    return rows


def _term(term, formatter: HtmlFormatter, learned=None) -> dict:
    from .learned import learned_plot

    return {"name": term.name, "kind": term.kind, "doc": term.doc, "fingerprint": term.fingerprint,
            "sql": Markup(highlight(term.sql, SqlLexer(), formatter)), "notes": term.notes,
            "columns": term.columns, "built_from": term.built_from,
            "learned": term.learned["function"] if term.learned else None,
            "learned_svg": Markup(learned_plot(learned, f"learned-{term.name}")) if learned else None}


def _curve(curve, models, held, index: int) -> dict:
    if curve.kind == LEVELS:
        caption = (f"{curve.column}: its {len(curve.x)} most frequent training levels; held at "
                   f"'{held[curve.column]}' in the other curves.")
    else:
        span = curve.range
        shown = (lambda value: f"{value:,.0f}") if curve.kind == INTEGER else figure
        caption = (f"{curve.column}: training values {shown(span.minimum)} to {shown(span.maximum)}, drawn "
                   f"from the 1st to the 99th percentile ({shown(span.low)} to {shown(span.high)}); held at "
                   f"the median {shown(held[curve.column])} in the other curves. Ticks: a sample of training values.")
    return {"column": curve.column, "svg": Markup(plots.curve_plot(curve, models, f"curve{index}")), "caption": caption}


def _performance(data: ReportData) -> list[dict]:
    fitted, figures = data.fitted, data.figures
    calibration = fitted.metrics.get("calibration") or []
    shown = []
    if fitted.link == "logit":
        if calibration:
            shown.append({"title": "Calibration by decile", "svg": plots.calibration_plot(calibration, fitted, "calibration")})
        if figures.score_bins:
            false_positive, true_positive = roc_points(figures.score_bins)
            shown.append({"title": "ROC curve", "svg": plots.roc_plot(false_positive, true_positive, fitted.metrics.get("auc"), "roc")})
            shown.append({"title": "Score distribution of each class", "svg": plots.distribution_plot(
                figures.score_bins, HISTOGRAM_BINS, fitted.threshold, fitted.target, "distribution")})
    else:
        if calibration:
            shown.append({"title": "Observed against predicted by decile",
                          "svg": plots.calibration_plot(calibration, fitted, "observed")})
        if figures.residual_deciles:
            shown.append({"title": "Deviance residuals by decile", "svg": plots.residual_plot(figures.residual_deciles, "residuals")})
    return [{**item, "svg": Markup(item["svg"])} for item in shown]


def _curves_json(data: ReportData) -> str:
    """The effect-curve numbers, so a reader (or a test) can check them against the scoring SQL."""
    payload = {
        "model": data.fitted.model,
        "models": [data.fitted.model] + ([data.other.model] if data.other else []),
        "held": data.held,
        "curves": [{"column": c.column, "kind": c.kind, "x": list(c.x), "predictions": {m: list(v) for m, v in c.predictions.items()}}
                   for c in data.curves],
    }
    text = json.dumps(payload, allow_nan=False, sort_keys=False)
    return text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")
