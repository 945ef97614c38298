"""`featpipe report`: one self-contained HTML page per fitted model, for people who look rather than read.

    >>> from featpipe.fitted.report import write_report                                       # doctest: +SKIP
    >>> write_report(project, "default_risk", against="default_raw")                  # doctest: +SKIP
    PosixPath('.../build/reports/default_risk-vs-default_raw.html')

The page is built from the fitted file and the engine: every curve and surface is the model's own
scoring SQL run over a grid in the engine. It is written atomically; nothing in it refers to the
network (no scripts, fonts or style sheets from elsewhere; figures are inline SVG).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from ...atomic import write_text_atomic
from ...engines.base import Engine
from ...engines.builds import read_builds, record_builds
from ...engines.compute import Progress, connect, prepare_inputs
from ...project import Project
from .. import FittedModel, file_hash
from ..current import refuse_if_stale
from ..drift_history import DriftHistory, history_path, read_history
from ..evaluations import read_evaluations
from ..scoring import load_fitted
from .compare import check_comparable, compare

__all__ = ["write_report", "write_reports", "report_path"]



def report_path(project: Project, model: str, against: str | None = None) -> Path:
    """The default place of a report: build/reports/MODEL.html, or MODEL-vs-OTHER.html for a comparison."""
    name = f"{model}-vs-{against}" if against else model
    return project.build_dir / "reports" / f"{name}.html"


def write_report(
    project: Project, model: str, *, against: str | None = None, pair: tuple[str, str] | None = None,
    out: Path | None = None, engine: Engine | None = None, allow_stale: bool = False,
) -> Path:
    """Write the report of fitted/MODEL.yaml (compared with fitted/AGAINST.yaml when given) and return its path.

    `pair` names the two numeric inputs of the decision surface (default: the two read together by the
    most terms). `engine` reuses an open engine of the project; by default one is opened and closed.
    A stale model is refused unless `allow_stale`; the page then says why it is stale.
    """
    fitted = load_fitted(project, model)
    other = load_fitted(project, against) if against else None
    if other is not None:
        check_comparable(fitted, other)
    stale = {item.model: refuse_if_stale(project, item, allow_stale=allow_stale) for item in (fitted, other) if item is not None}
    if engine is None:
        with connect(project) as opened:
            html = _build(opened, project, fitted, other, pair, stale)
    else:
        html = _build(engine, project, fitted, other, pair, stale)
    path = Path(out) if out is not None else report_path(project, model, against)
    write_text_atomic(path, html)
    return path


def write_reports(project: Project, models: Sequence[str], *, engine: Engine | None = None,
                  progress: Progress | None = None) -> list[Path]:
    """The default report of each of `models` (for `featpipe refresh`, the models whose fit changed)."""
    if not models:
        return []
    if engine is None:
        with connect(project) as opened:
            return write_reports(project, models, engine=opened, progress=progress)
    written = []
    for model in models:
        if progress:
            progress(f"writing the report of {model}")
        written.append(write_report(project, model, engine=engine))
    return written


def _build(engine: Engine, project: Project, fitted: FittedModel, other: FittedModel | None,
           pair: tuple[str, str] | None, stale: dict[str, tuple[str, ...]]) -> str:
    # numpy, matplotlib and jinja2 load only when a page is drawn, not with the API (`featpipe check`).
    from .data import gather
    from .render import Sources, render_report

    recorded = read_builds(engine)
    builds = dict(recorded)
    prepare_inputs(engine, project, {fitted.input}, builds)  # loads a changed `load:` file, checks the contract
    record_builds(engine, builds, recorded)
    data = gather(engine, project.inputs[fitted.input], fitted, other, pair)
    warnings = _warnings(fitted, stale[fitted.model], data.figures.train_rows)
    other_warnings = _warnings(other, stale[other.model], data.shared_rows[1]) if other is not None else ()
    comparison = (compare(fitted, other, data.shared_rows, data.shared_holdout, data.auc_sums)
                  if other is not None else None)
    sources = Sources(
        fitted_hash=file_hash(project.fitted_path(fitted.model)),
        other_hash=file_hash(project.fitted_path(other.model)) if other is not None else None,
        engine=engine.name,
        warnings=warnings,
        other_warnings=other_warnings,
        evaluations=read_evaluations(project.fitted_path(fitted.model)),
        drift_history=_history(project, fitted.model),
    )
    return render_report(data, sources, comparison)


def _history(project: Project, model: str) -> DriftHistory | None:
    found = read_history(history_path(project.fitted_path(model)), model)
    return found if found.rows else None


def _warnings(fitted: FittedModel, stale: tuple[str, ...], train_rows_now: int) -> tuple[str, ...]:
    """The fit's own warnings, then why it is stale: changed definitions (drawn anyway when allowed), or
    data that no longer match."""
    found = list(fitted.warnings)
    found += [f"stale: {reason}; run `featpipe fit {fitted.model}`" for reason in stale]
    if train_rows_now != fitted.rows["train"]:
        found.append(f"stale: input '{fitted.input}' now gives {train_rows_now:,} training rows where the fit had "
                     f"{fitted.rows['train']:,}; the data changed since the fit, run `featpipe fit {fitted.model}`")
    return tuple(found)
