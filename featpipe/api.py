"""The public Python API: every CLI command is one call here, and a notebook can call them too.

    >>> import featpipe
    >>> project = featpipe.load_project("projects/lease_default")   # doctest: +SKIP
    >>> featpipe.check(project).models                               # doctest: +SKIP
    >>> featpipe.compute(project)                                          # doctest: +SKIP
    >>> print(featpipe.render_sql(project, "default_risk", part="design", dialect="postgres"))  # doctest: +SKIP
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from .compiler import CompiledModel, CompiledProject, Term, compile_project
from .engines.base import Engine
from .engines.builds import read_builds
from .engines.compute import (
    BuiltTable,
    Progress,
    build_designs,
    connect,
    design_signature,
    say,
)
from .atomic import write_text_atomic
from .errors import Diagnostic, FeatpipeError
from .fitted.evaluations import Evaluation
from .fitting.evaluate import evaluate as evaluate_table
from .fitting.model import fit_model
from .fitting.suggest import SuggestReport, proposed_file_text
from .fitted import FittedModel, read_fitted, stale_fits, staleness, write_fitted
from .fitted.current import refuse_if_stale
from .fitted.report import report_path, write_reports
from .project import Project, load_project
from .sqlgen.common import DIALECTS, check_dialect, render
from .sqlgen.design import design_query, terms_query

__all__ = ["DIALECTS", "load_project", "check", "check_report", "connect", "compute", "fit", "refresh", "render_sql", "evaluate",
           "suggest", "write_proposed"]


def check(project: Project) -> CompiledProject:
    """All static validation; raises FeatpipeError listing every problem."""
    return compile_project(project)


@dataclass(frozen=True)
class CheckReport:
    root: Path
    compiled: CompiledProject
    warnings: tuple[Diagnostic, ...]
    stale: tuple[str, ...]  # one line per stale fitted model, saying what changed

    @property
    def terms(self) -> dict[str, Term]:
        return self.compiled.terms

    @property
    def models(self) -> dict[str, CompiledModel]:
        return self.compiled.models

    def as_dict(self) -> dict:
        return {
            "ok": True,
            "diagnostics": [d.as_dict() for d in self.warnings],
            "terms": {
                name: {"input": t.input, "file": t.file, "line": t.line, "kind": t.kind, "fingerprint": t.fingerprint, "sql": t.sql}
                for name, t in self.terms.items()
            },
            "models": {name: {"fingerprint": m.fingerprint, "terms": list(m.layout.terms)} for name, m in self.models.items()},
            "stale": list(self.stale),
        }


def check_report(project: Project) -> CheckReport:
    """`check` plus what the CLI shows: warnings and fitted models that no longer match."""
    compiled = check(project)
    return CheckReport(project.root, compiled, compiled.warnings, stale_fits(compiled))


def select_models(compiled: CompiledProject, names: list[str] | None) -> list[CompiledModel]:
    if not names:
        return list(compiled.models.values())
    unknown = [name for name in names if name not in compiled.models]
    if unknown:
        known = ", ".join(sorted(compiled.models)) or "none"
        raise FeatpipeError(f"unknown model {', '.join(unknown)}; specs in specs/: {known}")
    return [compiled.models[name] for name in names]


def compute(project: Project, models: list[str] | None = None, progress: Progress | None = None) -> list[BuiltTable]:
    """Load every input's `load:` file that changed, then build each model's design table in the engine;
    a failure keeps the previous table."""
    chosen = select_models(check(project), models)
    with connect(project) as engine:
        return build_designs(engine, project, chosen, every_file=True, progress=progress)


@dataclass(frozen=True)
class FitOutcome:
    model: str
    path: Path
    fitted: FittedModel
    changed: bool  # the fitted file's bytes changed


Fitted = Callable[[FitOutcome], None]


def fit_models(engine: Engine, project: Project, compiled: CompiledProject, models: list[CompiledModel],
               progress: Progress | None = None, fitted: Fitted | None = None) -> list[FitOutcome]:
    """Bring design tables up to date, fit each model and write its fitted file (atomically).

    `fitted` hears of each model as soon as its file is written, so a later model's failure does
    not hide what was already done.
    """
    build_designs(engine, project, models, only_stale=True, progress=progress)
    outcomes = []
    for model in models:
        say(progress, f"fitting {model.name} ({model.spec.family}, {len(model.terms)} terms)")
        path = project.fitted_path(model.name)
        before = path.read_bytes() if path.is_file() else None
        written = write_fitted(path, fit_model(engine, compiled, model))
        outcomes.append(FitOutcome(model.name, path, written, before != path.read_bytes()))
        if fitted:
            fitted(outcomes[-1])
    return outcomes


def fit(project: Project, models: list[str] | None = None, progress: Progress | None = None,
        fitted: Fitted | None = None) -> list[FitOutcome]:
    """Fit models in the engine and write fitted/MODEL.yaml; a failed fit leaves the old file in place."""
    compiled = check(project)
    chosen = select_models(compiled, models)
    with connect(project) as engine:
        return fit_models(engine, project, compiled, chosen, progress, fitted)


def refresh(project: Project, progress: Progress | None = None, fitted: Fitted | None = None) -> list[FitOutcome]:
    """Check, then refit every model whose fitted file is missing or stale or whose data file changed,
    and write the reports of the models whose fit changed (or that have none yet)."""
    compiled = check(project)
    with connect(project) as engine:
        builds = read_builds(engine)
        stale = []
        for model in compiled.models.values():
            path = project.fitted_path(model.name)
            current = builds.get(model.layout.table) == design_signature(project, model, builds)
            if not path.is_file() or staleness(read_fitted(path), model) or not current:
                stale.append(model)
        outcomes = fit_models(engine, project, compiled, stale, progress, fitted) if stale else []
        outdated = [o.model for o in outcomes if o.changed or not report_path(project, o.model).is_file()]
        write_reports(project, outdated, engine=engine, progress=progress)
        return outcomes


def evaluate(project: Project, model: str, table: str, by: str | None = None,
             progress: Progress | None = None) -> tuple[Evaluation, Path]:
    """Measure a fitted model on a labelled table (per period with `by`: a column or month_of(column))
    and write fitted/MODEL.evaluations/TABLE.yaml; refuses a stale fit."""
    return evaluate_table(project, model, table, by, progress)


def render_sql(project: Project, model: str, part: str = "design", dialect: str = "duckdb", table: str | None = None) -> str:
    """The generated SQL of one model, rendered for `dialect`."""
    check_dialect(dialect)
    compiled = check(project)
    (chosen,) = select_models(compiled, [model])
    source = project.inputs[chosen.spec.input]
    if part == "terms":
        statement = terms_query(list(chosen.terms), source, table)
    elif part == "design":
        statement = design_query(chosen, source, table)
    else:
        raise FeatpipeError(f"unknown part '{part}'; use terms or design")
    return render(statement, dialect) + ";\n"



def suggest(project: Project, model: str, *, top: int = 10, max_candidates: int = 500, min_rows: int = 30,
            progress: Progress | None = None) -> SuggestReport:
    """Candidate terms for a fitted model, ranked by score tests at its current fit (refused when stale)."""
    from .fitting.suggest import suggest as test_candidates

    compiled = check(project)
    (chosen,) = select_models(compiled, [model])
    path = project.fitted_path(model)
    if not path.is_file():
        raise FeatpipeError(f"fitted/{model}.yaml does not exist; run `featpipe fit -p {project.root} {model}` first")
    fitted = read_fitted(path)
    refuse_if_stale(project, fitted)
    with connect(project) as engine:
        build_designs(engine, project, [chosen], only_stale=True, progress=progress)
        say(progress, f"testing candidate terms for {model} in {engine.name}")
        return test_candidates(engine, compiled, chosen, fitted, top=top, max_candidates=max_candidates, min_rows=min_rows)


def write_proposed(project: Project, report: SuggestReport, into: Path, force: bool = False) -> Path:
    """Write the top suggestions as a term file (a relative path is under the project folder), atomically;
    an existing file is replaced only with `force`."""
    path = into if into.is_absolute() else project.root / into
    if path.suffix != ".sql":
        raise FeatpipeError(f"--into {into}: a term file ends in .sql, e.g. terms/proposed_{report.model}.sql")
    if path.exists() and not force:
        raise FeatpipeError(f"{path} already exists; pass --force to replace it, or choose another --into file")
    spec_display = project.models[report.model].display
    write_text_atomic(path, proposed_file_text(report, spec_display))
    return path
