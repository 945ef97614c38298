"""What the engine was last built from: a small table of (table, signature) pairs.

A signature joins the model's fingerprint with a hash of each local data file, so `refresh`
rebuilds a design table when a definition or a loaded file changed, and leaves it alone otherwise.
Tables the engine holds without a `load:` file cannot be hashed cheaply; rebuild them with
`featpipe compute` when their data changes.

A file's hash is remembered in the record with the file's size and modification time (a row named
`file:PATH`), so a command reads a large data file again only when one of them changed.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

from sqlglot import exp

from ..project import InputSpec
from ..sqlgen.common import alias, column
from .base import Engine

BUILDS_TABLE = "featpipe_builds"
FILE_ROW = "file:"  # prefix of the rows that remember a data file's hash with its size and modification time


def file_signature(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as stream:
        for block in iter(lambda: stream.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()[:16]


def file_stamp(path: Path) -> str:
    """Size and modification time (ns) of `path`: what a change to its bytes changes."""
    status = path.stat()
    return f"{status.st_size}:{status.st_mtime_ns}"


def input_signature(source: InputSpec, builds: dict[str, str] | None = None) -> str:
    """The hash of the input's `load:` file ("table" without one). With `builds` (the build record), a
    file whose size and modification time the record remembers is not read again."""
    if source.load is None:
        return "table"
    stamp, _, signature = (builds or {}).get(FILE_ROW + str(source.load), "").rpartition(" ")
    if signature and stamp == file_stamp(source.load):
        return signature
    return file_signature(source.load)


def remember_signature(builds: dict[str, str], source: InputSpec, stamp: str | None, signature: str) -> None:
    """Record the input file's `signature` with the `stamp` (`file_stamp`) taken before it was hashed, so a
    file changed while it was read is hashed again next time."""
    if source.load is not None and stamp is not None:
        builds[FILE_ROW + str(source.load)] = f"{stamp} {signature}"


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
