"""Drift history: `fitted/MODEL.drift.yaml`, one row per batch or period, in time order.

`featpipe drift MODEL --table T --history PERIOD` adds the batch's row under PERIOD (a month
2026-06 or a day 2026-06-30): the rows stay ordered by period, and a period measured again replaces
its row, so the file depends only on the batches measured, never on when or in which order they were
run. The file is written whole under a temporary name and then renamed (featpipe.atomic), so a run
killed part-way leaves it as it was; every value is checked when it is read back, like the fitted file.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path


from ..atomic import write_text_atomic
from ..errors import FeatpipeError
from ..project import Project
from ..project.yamlfile import read_text
from . import file_hash
from .drift import SEVERITY, DriftReport
from .file import dump_record, load_record
from .validate import COUNT, NAME, NUMBER, OPTIONAL_NUMBER, TEXT, check_record, scalar, listing, one_of, optional, record

PERIOD_PATTERN = re.compile(r"^\d{4}-(0[1-9]|1[0-2])(-(0[1-9]|[12]\d|3[01]))?\Z")
AGAIN = "remove the file (or the row) and run featpipe drift --history again for each period"
PERIOD = scalar("must be a month like 2026-06 or a day like 2026-06-30",
                 lambda value: isinstance(value, str) and PERIOD_PATTERN.match(value) is not None)
ROW = record({
    "period": PERIOD, "table": TEXT, "fitted": TEXT, "rows": COUNT, "score_psi": NUMBER, "score_shift": OPTIONAL_NUMBER,
    "score_outside": NUMBER, "score_reading": one_of(*SEVERITY), "largest_term_psi": NUMBER, "largest_term": optional(NAME),
    "largest_null_rise": OPTIONAL_NUMBER, "largest_unseen": OPTIONAL_NUMBER,
})
HISTORY = record({"model": NAME, "rows": listing(ROW)})


@dataclass(frozen=True)
class DriftHistory:
    model: str
    rows: tuple[dict, ...]  # ROW entries, ordered by period


def history_path(fitted_path: Path) -> Path:
    """fitted/MODEL.drift.yaml beside fitted/MODEL.yaml."""
    return fitted_path.with_suffix(".drift.yaml")


def history_row(report: DriftReport, period: str, fitted_hash: str) -> dict:
    """The figures a history keeps of one batch: the score's, the largest term PSI and the worst inputs."""
    check_period(period)
    largest = max(report.terms, key=lambda row: row.psi, default=None)
    inputs = report.inputs or ()
    return {
        "period": period, "table": report.table, "fitted": fitted_hash, "rows": report.rows,
        "score_psi": report.score.psi, "score_shift": report.score.shift, "score_outside": report.score.outside_share,
        "score_reading": report.score.reading,
        "largest_term_psi": largest.psi if largest else 0.0, "largest_term": largest.name if largest else None,
        "largest_null_rise": max((item.null_rise for item in inputs), default=None),
        "largest_unseen": max((item.unseen_share for item in inputs if item.unseen_share is not None), default=None),
    }


def check_period(period: str) -> None:
    if not PERIOD_PATTERN.match(period):
        raise FeatpipeError(f"--history {period}: give the batch's period as a month like 2026-06 or a day like "
                            "2026-06-30, so the history keeps its rows in time order")


def with_row(history: DriftHistory, row: dict) -> DriftHistory:
    """`history` with `row` in period order, replacing a row of the same period."""
    kept = [item for item in history.rows if item["period"] != row["period"]]
    return DriftHistory(history.model, tuple(sorted([*kept, row], key=lambda item: item["period"])))


def to_yaml(history: DriftHistory) -> str:
    return dump_record({"model": history.model, "rows": list(history.rows)})


def from_yaml(text: str, source: str) -> DriftHistory:
    """The history in `text`, every value checked and the rows' order verified; `source` names the file."""
    data = load_record(text, source, "a drift history", AGAIN)
    check_record(data, HISTORY, source, AGAIN)
    periods = [row["period"] for row in data["rows"]]
    if periods != sorted(set(periods)):
        raise FeatpipeError(f"{source}: the rows are not in time order, one per period; {AGAIN}")
    return DriftHistory(data["model"], tuple(data["rows"]))


def read_history(path: Path, model: str) -> DriftHistory:
    """The history at `path`, or an empty one when there is none yet."""
    if not path.is_file():
        return DriftHistory(model, ())
    return from_yaml(read_text(path, _source(path)), _source(path))


def append_history(path: Path, report: DriftReport, period: str, fitted_hash: str) -> DriftHistory:
    """Add the batch of `report` under `period` and write the file atomically; returns the history written."""
    history = with_row(read_history(path, report.model), history_row(report, period, fitted_hash))
    text = to_yaml(history)
    written = from_yaml(text, _source(path))
    write_text_atomic(path, text)
    return written


def record_drift(project: Project, report: DriftReport, period: str) -> Path:
    """Append `report` under `period` to fitted/MODEL.drift.yaml of the fit it measured; returns the path."""
    fitted_path = project.fitted_path(report.model)
    path = history_path(fitted_path)
    append_history(path, report, period, file_hash(fitted_path))
    return path


def _source(path: Path) -> str:
    """The file as messages name it: fitted/MODEL.drift.yaml."""
    return f"{path.parent.name}/{path.name}"
