"""The public Python API: every CLI command is one call here, and a notebook can call them too.

    >>> import featpipe
    >>> project = featpipe.load_project("projects/lease_default")   # doctest: +SKIP
    >>> featpipe.check(project).models                               # doctest: +SKIP
    >>> featpipe.materialize(project)                                # doctest: +SKIP
    >>> print(featpipe.render_sql(project, "default_risk", part="design", dialect="postgres"))  # doctest: +SKIP
"""

from __future__ import annotations

from collections.abc import Callable
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from sqlglot import exp

from .compiler import CompiledModel, CompiledProject, Term, compile_project
from .contract import check_contract
from .engines import open_engine
from .engines.base import Engine
from .errors import Diagnostic, FeatpipeError
from .fitted import stale_fits
from .project import Project, load_project
from .sqlgen.common import render
from .sqlgen.design import design_query, terms_query

DIALECTS = ("duckdb", "postgres", "spark", "snowflake", "bigquery", "sqlite")
Progress = Callable[[str], None]


@dataclass(frozen=True)
class BuiltTable:
    model: str
    table: str
    rows: int


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
        raise FeatpipeError(f"unknown model {', '.join(unknown)}; models in models/: {known}")
    return [compiled.models[name] for name in names]


@contextmanager
def connect(project: Project):
    engine = open_engine(project.engine)
    try:
        yield engine
    finally:
        engine.close()


def prepare_inputs(engine: Engine, project: Project, inputs: set[str], progress: Progress | None = None) -> None:
    """Load each input's `load:` file (if any) and check the engine's table against the contract."""
    for name in sorted(inputs):
        source = project.inputs[name]
        if source.load is not None:
            if progress:
                progress(f"loading {source.load.relative_to(project.root)} into {engine.name} table {name}")
            engine.load_file(name, source.load)
        check_contract(source, name, engine.describe(name), engine.name)


def materialize(project: Project, models: list[str] | None = None, progress: Progress | None = None) -> list[BuiltTable]:
    """Build each model's design table in the engine; a failure keeps the previous table."""
    compiled = check(project)
    chosen = select_models(compiled, models)
    built = []
    with connect(project) as engine:
        prepare_inputs(engine, project, {model.spec.input for model in chosen}, progress)
        for model in chosen:
            if progress:
                progress(f"building {model.layout.table}")
            engine.create_table(model.layout.table, design_query(model, project.inputs[model.spec.input]))
            rows = engine.fetch(_count(model.layout.table))[0][0]
            built.append(BuiltTable(model.name, model.layout.table, rows))
    return built


def _count(table: str) -> exp.Select:
    return exp.select(exp.Count(this=exp.Star())).from_(exp.to_table(table))


def render_sql(project: Project, model: str, part: str = "design", dialect: str = "duckdb", table: str | None = None) -> str:
    """The generated SQL of one model, rendered for `dialect`."""
    if dialect not in DIALECTS:
        raise FeatpipeError(f"unknown dialect '{dialect}'; use one of {', '.join(DIALECTS)}")
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

