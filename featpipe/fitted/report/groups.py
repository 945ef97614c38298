"""The report's group tables: outcomes across the groups of each `groups:` column, on the holdout and on
every evaluated table, with the reading a practitioner needs beside them."""

from __future__ import annotations

from .. import FittedModel
from ..evaluations import Evaluation

MIN_READABLE_ROWS = 30  # featpipe.fitting.groups.MIN_GROUP_ROWS: smaller groups carry their rows only
REVIEW_BELOW = 0.8  # the four-fifths rule, 29 CFR 1607.4(D)
READING = (
    "Each table reads one group column on the rows named. Flagged means predicted at or above the threshold "
    f"({{threshold}}). The ratios compare each group's share flagged, and its share not flagged, with the highest such "
    "share among the groups: the four-fifths rule of the US Uniform Guidelines on Employee Selection Procedures "
    "(29 CFR 1607.4(D)) is one common screen, applied to whichever outcome is the favourable one for the people "
    f"scored. A ratio below {REVIEW_BELOW} calls for review of the model, its terms and the data; it does not prove "
    "discrimination, and a ratio above it does not prove its absence. AUC and observed / predicted (1 when "
    f"calibrated) show whether the model ranks and predicts as well within each group. Groups under {MIN_READABLE_ROWS} "
    "rows are too small to read. Local law and the organisation's policy decide which groups must be checked, "
    "which test applies and what follows from it."
)
COLUMNS = ("group", "rows", "event rate", "mean predicted", "observed / predicted", "AUC", "share flagged",
           "flagged ratio", "not-flagged ratio")


def group_tables(fitted: FittedModel, evaluations: tuple[Evaluation, ...], fitted_hash: str) -> list[dict]:
    """One entry per (rows measured, group column): its title and rows of (label, cells, needs review)."""
    measured = [("held-out rows", fitted.group_tables)]
    measured += [(f"table {evaluation.table}", evaluation.group_tables) for evaluation in evaluations
                 if evaluation.fitted == fitted_hash and evaluation.group_tables]
    return [{"title": f"{column} on the {where}", "rows": [_row(entry) for entry in entries]}
            for where, tables in measured for column, entries in tables.items()]


def reading(fitted: FittedModel) -> str:
    return READING.format(threshold=fitted.threshold)


def _row(entry: dict) -> tuple[str, tuple, bool]:
    from .render import metric_text  # the one number format of the report

    label = "(missing)" if entry["group"] is None else entry["group"]
    if entry["too_small"]:
        return label, (metric_text(entry["rows"]), "too small to read"), False
    cells = (entry["rows"], entry["mean_observed"], entry["mean_predicted"], entry["observed_to_predicted"],
             entry.get("auc"), entry.get("flagged_share"), entry.get("flagged_ratio"), entry.get("unflagged_ratio"))
    low = [ratio for ratio in (entry.get("flagged_ratio"), entry.get("unflagged_ratio")) if ratio is not None]
    return label, tuple(metric_text(cell) for cell in cells), any(ratio < REVIEW_BELOW for ratio in low)
