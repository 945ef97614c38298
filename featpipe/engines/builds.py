"""What the engine was last built from: a small table of (table, signature) pairs.

A signature joins the model's fingerprint with a hash of each local data file, so `refresh`
rebuilds a design table when a definition or a loaded file changed, and leaves it alone otherwise.
Tables the engine holds without a `load:` file cannot be hashed cheaply; rebuild them with
`featpipe compute` when their data changes.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

from sqlglot import exp

from ..project import InputSpec
from ..sqlgen.common import alias, column
from .base import Engine

BUILDS_TABLE = "featpipe_builds"


def file_signature(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as stream:
        for block in iter(lambda: stream.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()[:16]


def input_signature(source: InputSpec) -> str:
    return file_signature(source.load) if source.load is not None else "table"


def read_builds(engine: Engine) -> dict[str, str]:
    if engine.describe(BUILDS_TABLE) is None:
        return {}
    query = exp.select(column("table_name"), column("signature")).from_(exp.to_table(BUILDS_TABLE))
    return {name: signature for name, signature in engine.fetch(query)}


def record_builds(engine: Engine, builds: dict[str, str], recorded: dict[str, str] | None = None) -> None:
    """Replace the record with `builds` (small: one row per input and design table).

    Nothing is written when `builds` equals `recorded`, the record as `read_builds` found it: a command
    that changed nothing leaves the engine alone (on Spark a table rewrite costs seconds).
    """
    if builds == recorded:
        return
    rows = [
        exp.select(alias(exp.Literal.string(name), "table_name"), alias(exp.Literal.string(signature), "signature"))
        for name, signature in sorted(builds.items())
    ]
    query = rows[0]
    for row in rows[1:]:
        query = exp.union(query, row, distinct=False)
    engine.create_table(BUILDS_TABLE, query)
