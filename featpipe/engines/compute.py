"""The design-table step: load local data, check contracts, build design tables only when needed.

Side effects go through the engine adapter; this module decides what to build and in which order.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from contextlib import contextmanager
from dataclasses import dataclass

from sqlglot import exp

from ..compiler import CompiledModel
from ..project import Project
from ..sqlgen.common import render
from ..sqlgen.design import design_query
from . import open_engine
from .base import Engine
from .builds import input_signature, read_builds, record_builds
from .contract import check_contract

Progress = Callable[[str], None]


@dataclass(frozen=True)
class BuiltTable:
    model: str
    table: str
    rows: int


@contextmanager
def connect(project: Project):
    engine = open_engine(project.engine)
    try:
        yield engine
    finally:
        engine.close()


def prepare_inputs(
    engine: Engine, project: Project, inputs: set[str], builds: dict[str, str], progress: Progress | None = None
) -> None:
    """Load each input's `load:` file when it changed, and check the engine's table against the contract."""
    for name in sorted(inputs):
        source = project.inputs[name]
        signature = input_signature(source)
        if source.load is not None and builds.get(name) != signature:
            say(progress, f"loading {source.load.relative_to(project.root)} into {engine.name} table {name}")
            engine.load_file(name, source.load)
        check_contract(source, name, engine.describe(name), engine.name)
        builds[name] = signature


def design_signature(project: Project, model: CompiledModel) -> str:
    """A hash of the design query and the input file's signature: a design table is rebuilt exactly when
    what it holds would change, not when a setting that only the fit reads (threshold, notes) did."""
    query = render(design_query(model, project.inputs[model.spec.input]), "duckdb", pretty=False)
    return f"{hashlib.sha256(query.encode()).hexdigest()[:16]}:{input_signature(project.inputs[model.spec.input])}"


def build_designs(
    engine: Engine, project: Project, models: list[CompiledModel], *, only_stale: bool = False,
    progress: Progress | None = None,
) -> list[BuiltTable]:
    """Build (or, with only_stale, rebuild when changed) each model's design table; a failure keeps the old one."""
    recorded = read_builds(engine)
    builds = dict(recorded)
    prepare_inputs(engine, project, {model.spec.input for model in models}, builds, progress)
    built = []
    for model in models:
        signature = design_signature(project, model)
        if only_stale and builds.get(model.layout.table) == signature and engine.describe(model.layout.table):
            continue
        say(progress, f"building {model.layout.table}")
        engine.create_table(model.layout.table, design_query(model, project.inputs[model.spec.input]))
        builds[model.layout.table] = signature
        rows = engine.fetch(_count(model.layout.table))[0][0]
        built.append(BuiltTable(model.name, model.layout.table, rows))
    record_builds(engine, builds, recorded)
    return built


def say(progress: Progress | None, message: str) -> None:
    if progress:
        progress(message)


def _count(table: str) -> exp.Select:
    return exp.select(exp.Count(this=exp.Star())).from_(exp.to_table(table))
