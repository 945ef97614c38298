"""The design-table step: load local data, check contracts, build design tables only when needed.

Side effects go through the engine adapter; this module decides what to build and in which order.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from functools import partial

from sqlglot import exp

from ..compiler import CompiledModel
from ..errors import EngineError
from ..project import InputSpec, Project
from ..sqlgen.common import render
from ..sqlgen.design import design_query
from . import open_engine
from .base import Engine
from .builds import file_stamp, input_signature, read_builds, record_builds, remember_signature
from .contract import check_contract, check_key

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
    """Load each input's `load:` file when it changed, and check the engine's table against the contract.

    A file is checked (columns, then key) on its temporary table before it replaces the input's table,
    so a bad file leaves the old table, and `builds` gets the file's signature only once it is in. A
    table without `load:` is checked as it is, key included; a loaded one's key was checked at load.
    A file whose size and modification time `builds` remembers is not hashed again; an unchanged file
    whose table is gone (dropped, or a DuckDB view whose kept copy was deleted) is loaded again.
    """
    for name in sorted(inputs):
        source = project.inputs[name]
        stamp = file_stamp(source.load) if source.load is not None else None
        signature = input_signature(source, builds)
        if source.load is None:
            check_contract(source, name, engine.describe(name), engine.name)
            check_key(engine, name, source.key, f"{engine.name} table '{name}'")
        elif builds.get(name) != signature or (loaded := engine.describe(name)) is None:  # changed, or gone
            shown = source.load.relative_to(project.root) if source.load.is_relative_to(project.root) else source.load
            say(progress, f"loading {shown} into {engine.name} table {name}")
            engine.load_file(name, source.load, partial(check_loaded_file, engine, source, str(shown)))
        else:
            check_contract(source, name, loaded, engine.name)
        builds[name] = signature
        remember_signature(builds, source, stamp, signature)


def check_loaded_file(engine: Engine, source: InputSpec, shown: str, building: str) -> None:
    """The contract and the key of a file `shown` as loaded into `building`, before it replaces the input's table."""
    check_contract(source, source.name, engine.describe(building), engine.name, subject=f"file {shown}")
    check_key(engine, building, source.key, shown)


def design_signature(project: Project, model: CompiledModel, builds: dict[str, str] | None = None) -> str:
    """A hash of the design query and the input file's signature: a design table is rebuilt exactly when
    what it holds would change, not when a setting that only the fit reads (threshold, notes) did.
    `builds` (the build record) spares hashing a file it remembers unchanged."""
    return query_signature(design_query(model, project.inputs[model.spec.input]), project.inputs[model.spec.input], builds)


def query_signature(query: exp.Select, source: InputSpec, builds: dict[str, str] | None = None) -> str:
    """`design_signature` of a design query already built."""
    text = render(query, "duckdb", pretty=False)
    return f"{hashlib.sha256(text.encode()).hexdigest()[:16]}:{input_signature(source, builds)}"


def build_designs(
    engine: Engine, project: Project, models: list[CompiledModel], *, only_stale: bool = False,
    every_file: bool = False, progress: Progress | None = None,
) -> list[BuiltTable]:
    """Build (or, with only_stale, rebuild when changed) each model's design table; a failure keeps the old one.

    The models' inputs are loaded and checked first; with `every_file`, so is every input with a
    `load:` file, so a batch no model trains on is in the engine to be scored.
    """
    recorded = read_builds(engine)
    builds = dict(recorded)
    built = []
    inputs = {model.spec.input for model in models}
    if every_file:
        inputs |= {name for name, source in project.inputs.items() if source.load is not None}
    try:
        prepare_inputs(engine, project, inputs, builds, progress)
        for model in models:
            source = project.inputs[model.spec.input]
            query = design_query(model, source)
            signature = query_signature(query, source, builds)
            if only_stale and builds.get(model.layout.table) == signature and engine.describe(model.layout.table):
                continue
            say(progress, f"building {model.layout.table}")
            engine.create_table(model.layout.table, query)
            builds[model.layout.table] = signature
            rows = engine.fetch(_count(model.layout.table))[0][0]
            built.append(BuiltTable(model.name, model.layout.table, rows))
    except Exception:
        # Record what did land (a file loaded before a later step failed): a stale signature would
        # keep its old file from being loaded again when the user restores it.
        with suppress(EngineError):
            record_builds(engine, builds, recorded)
        raise
    record_builds(engine, builds, recorded)
    return built


def say(progress: Progress | None, message: str) -> None:
    if progress:
        progress(message)


def _count(table: str) -> exp.Select:
    return exp.select(exp.Count(this=exp.Star())).from_(exp.to_table(table))
