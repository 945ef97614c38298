"""Input profiles at a fit: for every input column a term reads, its NULLs on the training rows and, for
a text column, the levels seen there, so that `drift` can compare a batch's inputs with them from the
fitted file alone. Computed in the engine (featpipe.sqlgen.inputs); the levels come back sorted here,
so the fitted file is the same whatever order an engine returns them in."""

from __future__ import annotations

from collections.abc import Mapping

from sqlglot import exp

from ..engines.base import Engine
from ..project import Holdout
from ..sqlgen.inputs import levels_query, training_nulls_query

MAX_LEVELS = 1000  # a text column with more levels than this is an identifier, not a category: no levels are kept


def input_profiles(engine: Engine, table: str, key: str, holdout: Holdout, columns: Mapping[str, str]) -> dict:
    """{"rows": training rows, "columns": {name: {"nulls": n, "levels": [...] (text columns; None above MAX_LEVELS)}}}
    for `columns` (name -> declared SQL type) of the input `table`, over its rows that are not held out."""
    if not columns:
        return {}
    names = sorted(columns)
    rows, *nulls = (int(value or 0) for value in engine.fetch(training_nulls_query(table, key, holdout, names))[0])
    profiles: dict[str, dict] = {name: {"nulls": count} for name, count in zip(names, nulls, strict=True)}
    for name in names:
        if is_text(columns[name]):
            found = [value for (value,) in engine.fetch(levels_query(table, key, holdout, name, MAX_LEVELS + 1))]
            profiles[name]["levels"] = sorted(str(value) for value in found) if len(found) <= MAX_LEVELS else None
    return {"rows": rows, "columns": profiles}


def is_text(declared: str) -> bool:
    return exp.DataType.build(declared, dialect="duckdb").is_type(*exp.DataType.TEXT_TYPES)
