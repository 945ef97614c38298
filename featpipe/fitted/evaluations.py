"""Evaluations of a fitted model on labelled tables: `fitted/MODEL.evaluations/TABLE.yaml`.

Written by `featpipe evaluate`, one file per table, beside the fitted file and reviewed like it: keys
in a fixed order, figures at the fitted file's precision, written atomically, and every value checked
against its kind when read back (the metrics with the fitted file's own schema of holdout metrics).
`fitted` is the hash of the fitted file that was evaluated, so a reader can tell an evaluation of an
earlier fit from one of the current fit.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from pathlib import Path


from ..atomic import write_text_atomic
from ..errors import FeatpipeError
from ..project.names import NAME_PATTERN
from ..project.yamlfile import read_text
from .file import dump_record, load_record
from .validate import COUNT, FINGERPRINT, GROUPS, METRICS, NAME, TEXT, check_record, scalar, listing, optional, record

AGAIN = "run featpipe evaluate again"
HASH = scalar("must be 16 lowercase hexadecimal digits", lambda value: isinstance(value, str) and len(value) == 16
               and all(c in "0123456789abcdef" for c in value))
PERIOD = record({"period": TEXT, "metrics": METRICS})
EVALUATION = record({"model": NAME, "table": TEXT, "fitted": HASH, "fingerprint": FINGERPRINT, "by": optional(TEXT),
                     "table_rows": COUNT,
                     "metrics": METRICS, "periods": listing(PERIOD)}, {"group_tables": GROUPS})


@dataclass(frozen=True)
class Evaluation:
    model: str
    table: str  # the labelled table, a declared input
    fitted: str  # hash of the fitted file evaluated (featpipe.fitted.file_hash)
    fingerprint: str  # the model's fingerprint at that fit
    by: str | None  # the period column or month_of(column), None for one batch
    table_rows: int  # rows of the table; the metrics count its complete rows
    metrics: dict  # the holdout metrics (featpipe.fitting.metrics.holdout_metrics) over every complete row
    periods: tuple[dict, ...] = ()  # {"period": label, "metrics": {...}} in period order
    group_tables: dict = field(default_factory=dict)  # featpipe.fitting.groups tables of the spec's group columns


def evaluations_folder(fitted_path: Path) -> Path:
    """fitted/MODEL.evaluations beside fitted/MODEL.yaml."""
    return fitted_path.with_suffix(".evaluations")


def evaluation_path(fitted_path: Path, table: str) -> Path:
    return evaluations_folder(fitted_path) / f"{table}.yaml"


def to_yaml(evaluation: Evaluation) -> str:
    data = asdict(evaluation)
    if not data["group_tables"]:
        del data["group_tables"]  # an evaluation without groups writes the file it always did
    return dump_record(data)


def from_yaml(text: str, source: str) -> Evaluation:
    """The evaluation in `text`, every value checked first; `source` names the file in messages."""
    data = load_record(text, source, "an evaluation file", AGAIN)
    check_record(data, EVALUATION, source, AGAIN)
    if not all(NAME_PATTERN.match(part) for part in data["table"].split(".")):
        raise FeatpipeError(f"{source}: table {data['table']!r} is not a table name; {AGAIN}")
    return Evaluation(**{**data, "periods": tuple(data["periods"])})


def write_evaluation(path: Path, evaluation: Evaluation) -> Evaluation:
    """Write atomically and return the evaluation as written; one featpipe would refuse to read is not written."""
    text = to_yaml(evaluation)
    written = from_yaml(text, _source(path))
    write_text_atomic(path, text)
    return written


def read_evaluation(path: Path) -> Evaluation:
    return from_yaml(read_text(path, _source(path)), _source(path))


def read_evaluations(fitted_path: Path) -> tuple[Evaluation, ...]:
    """Every evaluation of the model whose fitted file is `fitted_path`, by table name."""
    folder = evaluations_folder(fitted_path)
    return tuple(read_evaluation(path) for path in sorted(folder.glob("*.yaml"))) if folder.is_dir() else ()


def _source(path: Path) -> str:
    """The file as messages name it: fitted/MODEL.evaluations/TABLE.yaml."""
    return f"{path.parent.parent.name}/{path.parent.name}/{path.name}"


def stability_row(metrics: dict) -> dict:
    """The figures a stability table shows for one batch: rows, AUC (binomial), mean observed (the event
    rate for binomial), mean prediction and their ratio (calibration in the large: 1 is calibrated)."""
    rows = metrics.get("rows") or 0
    if not rows:
        return {"rows": 0, "auc": None, "mean_observed": None, "mean_predicted": None, "observed_to_predicted": None}
    deciles = metrics.get("calibration") or []
    predicted = sum(item["rows"] * item["mean_predicted"] for item in deciles) / rows
    observed = sum(item["rows"] * item["mean_observed"] for item in deciles) / rows
    return {"rows": rows, "auc": metrics.get("auc"), "mean_observed": observed, "mean_predicted": predicted,
            "observed_to_predicted": observed / predicted if predicted else None}
