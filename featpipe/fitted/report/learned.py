"""The report's figure of each learned term, drawn under the term.

- SPLINE and CAPPED: the term's contribution to the linear predictor (the sum over its columns of
  coefficient * (column - training mean), as scoring centres it) as a curve over the training range
  of its argument, computed in the engine by the term's own column SQL (sqlgen.learned.design_columns)
  over a grid; under it, the training rows per decile of the argument (its profile), drawn as rows
  per unit so the bars' areas are the rows.
- LEVELS and BINS: a point per level or bin, its coefficient against the reference (0) with its 95%
  interval, labelled with its training rows (LEVELS: the fitted file's counts, `other` the pooled
  levels together; BINS: each indicator's training mean times the training rows, bin 1 the rest).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from matplotlib.figure import Figure
from sqlglot import exp

from ...engines.base import Engine
from ...sqlgen.common import alias, column
from ...sqlgen.learned import OTHER, design_columns
from .. import FittedModel, FittedTerm
from ..learned import constants_of
from .plots import MODEL_COLOURS, _styled, to_svg
from .queries import literal, union_all

GRID_POINTS = 61
GRID = "_x"


@dataclass(frozen=True)
class LearnedFigure:
    """What one learned term's figure shows: a curve (x numbers) or points (x labels) with intervals."""

    term: str
    function: str
    x: tuple
    y: tuple[float, ...]
    low: tuple[float | None, ...] = ()  # points only
    high: tuple[float | None, ...] = ()
    counts: tuple[int, ...] = ()  # training rows per point, or per training decile of a curve
    edges: tuple[float, ...] = ()  # a curve: the deciles' bounds (minimum, edges, maximum)

    @property
    def is_curve(self) -> bool:
        return self.function in ("SPLINE", "CAPPED")


def learned_figures(engine: Engine, fitted: FittedModel) -> dict[str, LearnedFigure]:
    """The figure of every learned term of `fitted`, by term name (curves need one query each)."""
    found = {}
    for term in fitted.model_terms:
        if term.learned is None:
            continue
        function = term.learned["function"]
        found[term.name] = _curve(engine, term) if function in ("SPLINE", "CAPPED") else _points(term, fitted.rows["train"])
    return found


def _curve(engine: Engine, term: FittedTerm) -> LearnedFigure:
    profile, columns = term.profile, term.learned["columns"]
    grid = tuple(float(x) for x in np.linspace(profile.min, profile.max, GRID_POINTS))
    values = union_all([exp.select(alias(literal(x), GRID)) for x in grid])
    expressions = design_columns(constants_of(term.learned), column(GRID))
    query = (exp.select(column(GRID), *(alias(value, f"_c{index}") for index, value in enumerate(expressions)))
             .from_(values.subquery("_grid")).order_by(column(GRID)))
    rows = engine.fetch(query)
    y = tuple(sum(item["estimate"] * (float(value) - item["mean"]) for item, value in zip(columns, row[1:], strict=True))
              for row in rows)
    counts = tuple(round(share * profile.count) for share in profile.shares)
    return LearnedFigure(term.name, term.learned["function"], tuple(float(row[0]) for row in rows), y, counts=counts,
                         edges=(profile.min, *profile.edges, profile.max))


def _points(term: FittedTerm, train: int) -> LearnedFigure:
    learned, columns = term.learned, term.learned["columns"]
    if learned["function"] == "LEVELS":
        constants = constants_of(learned)
        rows = dict(constants.levels)
        counted = {label: sum(rows[level] for level in constants.pooled) if label == OTHER else rows[label]
                   for label in constants.columns}
        reference_rows = rows[constants.reference] + (0 if OTHER in constants.columns
                                                      else sum(rows[level] for level in constants.pooled))
        labels = (f"{constants.reference}\n(reference)", *(item["label"] for item in columns))
        counts = (reference_rows, *(counted[item["label"]] for item in columns))
    else:
        edges = learned["values"]
        bounds = [f"≤ {edges[0]:.4g}", *(f"({a:.4g}, {b:.4g}]" for a, b in zip(edges, edges[1:])), f"> {edges[-1]:.4g}"]
        labels = (f"bin 1 {bounds[0]}\n(reference)", *(f"{item['label']} {bound}" for item, bound in zip(columns, bounds[1:])))
        counted = tuple(round(item["mean"] * train) for item in columns)
        counts = (train - sum(counted), *counted)
    return LearnedFigure(term.name, learned["function"], labels, (0.0, *(item["estimate"] for item in columns)),
                         (None, *(item["ci_low"] for item in columns)), (None, *(item["ci_high"] for item in columns)),
                         counts)


@_styled
def learned_plot(figure: LearnedFigure, name: str) -> str:
    """A curve with the training rows per decile beneath, or points with intervals labelled by rows."""
    drawing = Figure(figsize=(5.3, 3.2))
    if figure.is_curve:
        drawing.subplots_adjust(left=0.15, right=0.97, bottom=0.16, top=0.96, hspace=0.08)
        axes, below = drawing.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": (3, 1)})
        axes.plot(figure.x, figure.y, color=MODEL_COLOURS[0], linewidth=1.8)
        axes.set_ylabel("contribution to the\nlinear predictor", fontsize=7.5)
        widths = np.diff(figure.edges)
        density = [count / width if width > 0 else 0.0 for count, width in zip(figure.counts, widths, strict=True)]
        below.bar(figure.edges[:-1], density, width=widths, align="edge", color="#b9c9d6", edgecolor="white")
        below.set_ylabel("training rows\nper unit", fontsize=7)
        below.set_xlabel(f"{figure.term}: its argument over the training range")
    else:
        drawing.subplots_adjust(left=0.15, right=0.97, bottom=0.3, top=0.96)
        axes = drawing.add_subplot()
        positions = np.arange(len(figure.x))
        for position, value, low, high in zip(positions, figure.y, figure.low, figure.high, strict=True):
            if low is not None:
                axes.plot([position, position], [low, high], color=MODEL_COLOURS[0], linewidth=2.2, solid_capstyle="butt")
            axes.plot([position], [value], "o", color=MODEL_COLOURS[0], markersize=5)
        axes.axhline(0.0, color="#444444", linewidth=0.9, linestyle="--")
        axes.set_xticks(positions, [f"{label}\n{count:,} rows" for label, count in zip(figure.x, figure.counts, strict=True)],
                        fontsize=6.5)
        axes.set_ylabel("difference from the reference\nin the linear predictor (95% interval)", fontsize=7.5)
    return to_svg(drawing, name)
