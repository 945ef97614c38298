"""The report's figures: matplotlib figures written as inline SVG that references nothing outside itself.

Text is drawn as paths (no font files), and the XML declaration, DOCTYPE, comments, metadata and
namespace declarations are removed: an <svg> element inside HTML needs none of them, and so the
report holds no network address at all. Every id is prefixed per figure, so figures in one page
never share an id. Figures use matplotlib's object API (no pyplot state), so nothing is global.
"""

from __future__ import annotations

import functools
import io
import re
from collections.abc import Sequence

import matplotlib
import numpy as np
from matplotlib.figure import Figure

from .. import FittedModel
from ..notes import figure as figure_text
from ..notes import words
from .data import LEVELS, Curve, Surface
from .queries import SCORE_BINS
from .readings import predicted_words

MODEL_COLOURS = ("#1b5e8c", "#c8611a")
LINE_STYLES = ("-", "--")
EVENT, NON_EVENT = "#c0392b", "#2c6fa8"
BELOW, ABOVE = "#e8f1f8", "#fbe3d3"
STYLE = {
    "svg.fonttype": "path",
    "svg.hashsalt": "featpipe-report",  # fixed ids, so the same data give the same file
    "font.family": "DejaVu Sans",
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#e3e3e3",
    "grid.linewidth": 0.6,
    "legend.frameon": False,
    "legend.fontsize": 8,
}


def _styled(draw):
    """Run a figure function under the report's style: matplotlib reads rcParams as artists are made."""

    @functools.wraps(draw)
    def styled(*args, **kwargs):
        with matplotlib.rc_context(STYLE):
            return draw(*args, **kwargs)

    return styled


@_styled
def interval_plot(fitted: FittedModel, name: str) -> str:
    """Each term's effect per step with its 95% interval, against the line of no effect."""
    terms = [term for term in fitted.model_terms if term.effect is not None]
    ratio = bool(terms) and terms[0].effect.kind != "difference"
    labels = [f"{t.name} (per {t.effect.step:g})" for t in reversed(terms)]
    height = 0.9 + 0.3 * max(len(terms), 1)
    figure = Figure(figsize=(7.2, height))
    figure.subplots_adjust(left=min(0.55, (0.25 + 0.062 * max(map(len, labels), default=10)) / 7.2), right=0.97,
                           bottom=0.55 / height, top=1 - 0.15 / height)
    axes = figure.add_subplot()
    for row, term in enumerate(reversed(terms)):
        effect = term.effect
        clear = effect.low is not None and (effect.low > (1.0 if ratio else 0.0) or effect.high < (1.0 if ratio else 0.0))
        colour = MODEL_COLOURS[0] if clear else "#8a8a8a"
        if effect.low is not None:
            axes.plot([effect.low, effect.high], [row, row], color=colour, linewidth=2.2, solid_capstyle="butt")
        axes.plot([effect.value], [row], "o", color=colour, markersize=5)
    axes.axvline(1.0 if ratio else 0.0, color="#444444", linewidth=0.9, linestyle="--")
    axes.set_yticks(range(len(terms)), labels)
    axes.grid(axis="y", visible=False)
    if ratio:
        axes.set_xscale("log")
        axes.xaxis.set_major_locator(matplotlib.ticker.LogLocator(subs=(1.0, 2.0, 5.0)))
        axes.xaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(lambda value, _: f"{value:g}"))
        axes.xaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
    kind = terms[0].effect.kind if terms else "effect"
    if any(t.effect.low is not None for t in terms):
        axes.set_xlabel(f"{kind} per step, with 95% interval (grey: the interval includes no effect)")
    else:
        axes.set_xlabel(f"{kind} per step, estimates only (a penalized fit has no intervals)")
    return to_svg(figure, name)


@_styled
def curve_plot(curve: Curve, models: Sequence[FittedModel], name: str) -> str:
    """The prediction as one input moves, per model on the same axes, with a rug of training values."""
    fitted = models[0]
    figure = Figure(figsize=(5.3, 3.2))
    figure.subplots_adjust(left=0.15, right=0.97, bottom=0.2 if curve.kind == LEVELS else 0.16, top=0.96)
    axes = figure.add_subplot()
    if curve.kind == LEVELS:
        positions = np.arange(len(curve.x))
        for index, model in enumerate(models):
            values = [np.nan if v is None else v for v in curve.predictions[model.model]]
            shift = (index - (len(models) - 1) / 2) * 0.18
            axes.plot(positions + shift, values, "o", color=MODEL_COLOURS[index], markersize=6, label=model.model)
        total = sum(curve.range.counts) or 1
        axes.set_xticks(positions, [f"{level}\n{count / total:.0%}" for level, count in zip(curve.x, curve.range.counts)],
                        rotation=0, fontsize=7)
        axes.set_xlim(-0.6, len(curve.x) - 0.4)
        axes.set_xlabel(f"{curve.column} (share of training rows under each level)")
    else:
        for index, model in enumerate(models):
            values = [np.nan if v is None else v for v in curve.predictions[model.model]]
            axes.plot(curve.x, values, color=MODEL_COLOURS[index], linewidth=1.8, label=model.model,
                      linestyle=LINE_STYLES[index], marker="o" if len(curve.x) <= 12 else None, markersize=4)
        inside = [value for value in curve.rug if curve.x[0] <= value <= curve.x[-1]]
        axes.plot(inside, [0.0] * len(inside), "|", color="#555555", markersize=9, alpha=0.35,
                  transform=axes.get_xaxis_transform())
        if len(curve.x) > 1:
            axes.set_xlim(curve.x[0], curve.x[-1])
        axes.set_xlabel(curve.column)
        _readable_ticks(axes.xaxis)
    if fitted.link == "logit":
        axes.axhline(fitted.threshold, color="#444444", linewidth=0.8, linestyle=":")
    if fitted.family != "gaussian":  # probabilities and counts start at zero
        axes.set_ylim(bottom=0)
    axes.margins(y=0.08)
    axes.set_ylabel(predicted_words(fitted), fontsize=7.5)
    if len(models) > 1:
        axes.legend(loc="best")
    return to_svg(figure, name)


@_styled
def surface_plot(surface: Surface, models: Sequence[FittedModel], name: str) -> str:
    """Each model's prediction over a grid of two inputs (the others held), with held-out rows on top."""
    fitted = models[0]
    width = 5.1 * len(models) + (1.3 if fitted.link != "logit" else 0.5)
    figure = Figure(figsize=(width, 4.6))
    figure.subplots_adjust(left=0.7 / width, right=1 - (1.3 if fitted.link != "logit" else 0.15) / width,
                           bottom=0.12, top=0.93, wspace=0.08)
    panels = figure.subplots(1, len(models), sharex=True, sharey=True, squeeze=False)[0]
    xs, ys = np.array(surface.xs), np.array(surface.ys)
    points = np.array(surface.points) if surface.points else np.empty((0, 4))
    inside = points[(points[:, 0] >= xs[0]) & (points[:, 0] <= xs[-1]) & (points[:, 1] >= ys[0]) & (points[:, 1] <= ys[-1])]
    shading = None
    for index, (axes, model) in enumerate(zip(panels, models)):
        values = np.ma.masked_invalid(surface.predictions[model.model])
        if fitted.link == "logit":
            axes.contourf(xs, ys, values, levels=[0.0, fitted.threshold, 1.0], colors=[BELOW, ABOVE])
            shown = np.concatenate([v[np.isfinite(v)].ravel() for v in surface.predictions.values()])
            lines = axes.contour(xs, ys, values, levels=_probability_levels(shown, fitted.threshold),
                                 colors="#9a9a9a", linewidths=0.6)
            axes.clabel(lines, fontsize=6.5, fmt=lambda level: f"{level:g}")
            axes.contour(xs, ys, values, levels=[fitted.threshold], colors=MODEL_COLOURS[index], linewidths=2.2)
            events = inside[:, 2] > 0.5
            axes.scatter(inside[~events, 0], inside[~events, 1], s=9, facecolors="none", edgecolors=NON_EVENT,
                         linewidths=0.7, label=f"held out, {fitted.target} = 0")
            axes.scatter(inside[events, 0], inside[events, 1], s=16, color=EVENT, marker="^", linewidths=0,
                         label=f"held out, {fitted.target} = 1")
        else:
            levels = _value_levels(points[:, 3], fitted.family)
            shading = axes.contourf(xs, ys, values, levels=levels, cmap="Blues", extend="both")
            lines = axes.contour(xs, ys, values, levels=levels, colors="#ffffff", linewidths=0.5)
            axes.clabel(lines, lines.levels[::2], fontsize=6.5, fmt=lambda level: figure_text(level))
            if fitted.family == "poisson":
                for count, colour, marker in ((0, "#555555", "o"), (1, "#e07b00", "^"), (2, EVENT, "s")):
                    chosen = inside[:, 2] == count if count < 2 else inside[:, 2] >= 2
                    label = f"{fitted.target} = {count}" if count < 2 else f"{fitted.target} ≥ 2"
                    axes.scatter(inside[chosen, 0], inside[chosen, 1], s=10 + 6 * count, color=colour, marker=marker,
                                 linewidths=0, alpha=0.8, label=f"held out, {label}")
            else:
                axes.scatter(inside[:, 0], inside[:, 1], c=inside[:, 2], cmap="Oranges", s=10, linewidths=0,
                             label=f"held out, coloured by {fitted.target}")
        axes.set_title(model.model)
        axes.set_xlabel(surface.a)
        axes.grid(False)
        _readable_ticks(axes.xaxis)
        _readable_ticks(axes.yaxis)
    panels[0].set_ylabel(surface.b)
    if shading is not None:
        bar = figure.colorbar(shading, ax=list(panels), label=predicted_words(fitted), shrink=0.9, pad=0.02)
        bar.ax.yaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(lambda value, _: figure_text(value)))
    panels[0].legend(loc="upper right", fontsize=7, framealpha=0.85, frameon=True)
    return to_svg(figure, name)


@_styled
def calibration_plot(calibration: Sequence[dict], fitted: FittedModel, name: str) -> str:
    """Mean observed against mean predicted in each decile of the prediction, with the diagonal."""
    figure = Figure(figsize=(3.6, 3.3))
    figure.subplots_adjust(left=0.19, right=0.96, bottom=0.15, top=0.96)
    axes = figure.add_subplot()
    predicted = [row["mean_predicted"] for row in calibration]
    observed = [row["mean_observed"] for row in calibration]
    top = max(predicted + observed) * 1.05
    axes.plot([0, top], [0, top], color="#888888", linestyle="--", linewidth=0.9, label="perfect calibration")
    axes.plot(predicted, observed, "-o", color=MODEL_COLOURS[0], markersize=4, linewidth=1.4, label="deciles")
    axes.set_xlim(0, top)
    axes.set_ylim(0, top)
    axes.set_aspect("equal")
    axes.set_xlabel("mean predicted in the decile")
    axes.set_ylabel(f"mean observed {words(fitted.target)}")
    axes.legend(loc="upper left")
    return to_svg(figure, name)


@_styled
def roc_plot(false_positive: Sequence[float], true_positive: Sequence[float], auc: float | None, name: str) -> str:
    figure = Figure(figsize=(3.6, 3.3))
    figure.subplots_adjust(left=0.19, right=0.96, bottom=0.15, top=0.96)
    axes = figure.add_subplot()
    axes.plot([0, 1], [0, 1], color="#888888", linestyle="--", linewidth=0.9, label="chance")
    label = f"model (AUC {auc:.3f})" if auc is not None else "model"
    axes.plot(false_positive, true_positive, color=MODEL_COLOURS[0], linewidth=1.6, label=label)
    axes.set_xlim(0, 1)
    axes.set_ylim(0, 1.01)
    axes.set_aspect("equal")
    axes.set_xlabel("false positive rate")
    axes.set_ylabel("true positive rate")
    axes.legend(loc="lower right")
    return to_svg(figure, name)


@_styled
def distribution_plot(score_bins: Sequence[tuple[int, int, float]], bins: int, threshold: float, target: str, name: str) -> str:
    """The share of each class's held-out rows per band of predicted probability, and the threshold."""
    figure = Figure(figsize=(4.4, 3.3))
    figure.subplots_adjust(left=0.16, right=0.97, bottom=0.15, top=0.96)
    axes = figure.add_subplot()
    top = max((b for b, _, _ in score_bins), default=SCORE_BINS - 1) + 1
    edges = np.linspace(0, min(1.0, top / SCORE_BINS * 1.02), bins + 1)
    centres = np.array([(b + 0.5) / SCORE_BINS for b, _, _ in score_bins])
    events = np.array([e for _, _, e in score_bins])
    non_events = np.array([rows - e for _, rows, e in score_bins])
    for weights, colour, label in ((non_events, NON_EVENT, f"{target} = 0"), (events, EVENT, f"{target} = 1")):
        total = weights.sum() or 1.0
        axes.hist(centres, bins=edges, weights=weights / total, histtype="stepfilled", alpha=0.35, color=colour)
        axes.hist(centres, bins=edges, weights=weights / total, histtype="step", color=colour, linewidth=1.2, label=label)
    axes.axvline(threshold, color="#444444", linestyle=":", linewidth=0.9, label=f"threshold {threshold:g}")
    axes.set_xlabel("predicted probability")
    axes.set_ylabel("share of the class's held-out rows")
    axes.legend(loc="upper right")
    return to_svg(figure, name)


@_styled
def residual_plot(deciles: Sequence[dict], name: str) -> str:
    """Deviance residuals of held-out rows per decile of the prediction: median, quartiles, 10th-90th."""
    figure = Figure(figsize=(4.4, 3.3))
    figure.subplots_adjust(left=0.16, right=0.97, bottom=0.15, top=0.96)
    axes = figure.add_subplot()
    stats = [{"med": d["q50"], "q1": d["q25"], "q3": d["q75"], "whislo": d["q10"], "whishi": d["q90"], "fliers": [],
              "label": str(d["decile"])} for d in deciles]
    axes.bxp(stats, showfliers=False, patch_artist=True,
             boxprops={"facecolor": "#d7e6f2", "edgecolor": MODEL_COLOURS[0]},
             medianprops={"color": MODEL_COLOURS[0], "linewidth": 1.6})
    axes.axhline(0.0, color="#888888", linestyle="--", linewidth=0.9)
    axes.set_xlabel("decile of the prediction (1 = lowest)")
    axes.set_ylabel("deviance residual (10th, 25th, 50th, 75th, 90th pct.)", fontsize=7.5)
    return to_svg(figure, name)


def to_svg(figure: Figure, name: str) -> str:
    buffer = io.StringIO()
    figure.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None})
    return inline_svg(buffer.getvalue(), name)


def inline_svg(text: str, prefix: str) -> str:
    """matplotlib's SVG document as an element for HTML: no prolog, comments, metadata or namespaces;
    ids prefixed with `prefix`; width following the page."""
    text = re.sub(r"<\?xml.*?\?>", "", text, flags=re.S)
    text = re.sub(r"<!DOCTYPE.*?>", "", text, flags=re.S)
    text = re.sub(r"<!--.*?-->", "", text, flags=re.S)
    text = re.sub(r"<metadata>.*?</metadata>", "", text, flags=re.S)
    text = re.sub(r'\s+xmlns(:\w+)?="[^"]*"', "", text)
    text = text.replace("xlink:href=", "href=")
    ids = re.findall(r'\sid="([^"]+)"', text)
    for old in sorted(set(ids), key=len, reverse=True):
        new = f"{prefix}-{old}"
        text = text.replace(f'id="{old}"', f'id="{new}"').replace(f'href="#{old}"', f'href="#{new}"')
        text = text.replace(f"url(#{old})", f"url(#{new})")
    # The page sets the width; the figure's own width caps it, so text is never drawn larger than made.
    text = re.sub(r'<svg([^>]*?)\swidth="([^"]*)"\s+height="[^"]*"', r'<svg\1 class="figure" style="max-width: \2"', text, count=1)
    if "://" in text:
        raise AssertionError(f"figure {prefix} still holds an address")
    return text.strip()


def _readable_ticks(axis) -> None:
    """At most six ticks, thousands written as 20k, so long numbers never run into each other."""
    axis.set_major_locator(matplotlib.ticker.MaxNLocator(6))
    low, high = axis.get_view_interval()
    if max(abs(low), abs(high)) >= 10_000:
        axis.set_major_formatter(matplotlib.ticker.FuncFormatter(lambda value, _: f"{value / 1000:g}k"))


def _value_levels(values: np.ndarray, family: str) -> np.ndarray:
    """Ten bands between the 2nd and 98th percentile of the held-out rows' predictions, on a log scale for
    counts: a grid's corners, far from any row, would otherwise take every colour."""
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return np.linspace(0.0, 1.0, 11)
    low, high = np.quantile(finite, [0.02, 0.98])
    if family == "poisson" and low > 0:
        levels = np.geomspace(low, high, 11) if high > low else np.array([low, low * 1.01])
    else:
        levels = np.linspace(low, high, 11) if high > low else np.array([low, low + 1e-9])
    return np.unique(levels)


def _probability_levels(values: np.ndarray, threshold: float) -> list[float]:
    """A few round probabilities inside the range shown, other than the threshold (drawn apart)."""
    if values.size == 0:
        return []
    low, high = float(values.min()), float(values.max())
    candidates = [0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.98, 0.99]
    return [level for level in candidates if low < level < high and abs(level - threshold) > 1e-9]
