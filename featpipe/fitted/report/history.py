"""The report's drift history: the score's PSI and mean shift per batch from fitted/MODEL.drift.yaml,
as a chart with the PSI's reading thresholds and as a table beside it."""

from __future__ import annotations

from matplotlib.figure import Figure

from ..drift import MAJOR_ABOVE, MODERATE_FROM
from ..drift_history import DriftHistory
from .plots import MODEL_COLOURS, _styled, to_svg

COLUMNS = ("period", "table", "rows", "score PSI", "score shift", "outside training range", "reading",
           "largest term PSI", "largest NULL rise", "largest unseen share")


@_styled
def history_plot(history: DriftHistory, name: str) -> str:
    """Score PSI (with the 0.1 and 0.25 lines) and the score's mean shift, one point per period."""
    periods = [row["period"] for row in history.rows]
    positions = range(len(periods))
    figure = Figure(figsize=(6.4, 3.2))
    figure.subplots_adjust(left=0.1, right=0.98, bottom=0.22, top=0.92, wspace=0.3)
    psi, shift = figure.subplots(1, 2)
    psi.plot(positions, [row["score_psi"] for row in history.rows], "-o", color=MODEL_COLOURS[0], markersize=4)
    for level, label in ((MODERATE_FROM, "moderate"), (MAJOR_ABOVE, "major")):
        psi.axhline(level, color="#888888", linestyle="--", linewidth=0.8)
        psi.annotate(label, (0, level), xytext=(2, 2), textcoords="offset points", fontsize=7, color="#666666")
    psi.set_title("score PSI")
    shifts = [row["score_shift"] if row["score_shift"] is not None else float("nan") for row in history.rows]
    shift.plot(positions, shifts, "-o", color=MODEL_COLOURS[1], markersize=4)
    shift.axhline(0.0, color="#888888", linestyle="--", linewidth=0.8)
    shift.set_title("score mean shift (linear predictor)")
    for axes in (psi, shift):
        axes.set_xticks(list(positions), periods, rotation=45, ha="right")
    return to_svg(figure, name)


def history_rows(history: DriftHistory) -> list[tuple[str, ...]]:
    from .render import metric_text  # the one number format of the report

    return [(row["period"], row["table"], metric_text(row["rows"]), metric_text(row["score_psi"]),
             metric_text(row["score_shift"]), metric_text(row["score_outside"]), row["score_reading"],
             f"{metric_text(row['largest_term_psi'])} ({row['largest_term'] or ''})",
             metric_text(row["largest_null_rise"]), metric_text(row["largest_unseen"])) for row in history.rows]
