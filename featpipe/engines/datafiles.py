"""What a data file must be before any engine loads it: a file, not empty, and (a CSV) UTF-8 text.

Each engine reports a bad file in its own words, often without the file's name (DuckDB: "CSV Error
on Line: 3"), or not at all: Spark reads invalid UTF-8 as U+FFFD and Arrow as binary columns, and an
empty CSV loads as a table with one unnamed column. Checking the file first gives one message per
problem, naming the file, on every engine.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

from ..errors import EngineError

BLOCK_BYTES = 1 << 20


def check_data_file(path: Path, engine: str) -> None:
    """Refuse a path that is a directory, missing or empty, and a CSV file that is not UTF-8."""
    path = Path(path)
    if path.is_dir():
        raise EngineError(
            f"{engine}: cannot load {path}: it is a directory; point 'load:' at one .csv or .parquet file"
        )
    if not path.is_file():
        raise EngineError(f"{engine}: cannot load {path}: no such file")
    if path.stat().st_size == 0:
        raise EngineError(
            f"{engine}: cannot load {path}: the file is empty; a CSV file starts with a header row naming the columns"
        )
    if path.suffix.lower() == ".csv":
        line = first_line_not_utf8(path)
        if line is not None:
            raise EngineError(
                f"{engine}: cannot load {path}: line {line} is not UTF-8 text; save the file as UTF-8"
            )


def first_line_not_utf8(path: Path) -> int | None:
    """The number of the first line that is not valid UTF-8, or None when the whole file is.

    Lines are counted only once a bad byte is found, so a good file costs one decoding pass.
    """
    before = 0  # bytes of the file before `lines`
    for lines in _whole_lines(path):
        try:
            lines.decode("utf-8")
        except UnicodeDecodeError as error:
            return 1 + _newlines(path, before) + lines.count(b"\n", 0, error.start)
        before += len(lines)
    return None


def _whole_lines(path: Path) -> Iterator[bytes]:
    """The file in blocks of whole lines, so no character is cut in two."""
    rest = b""
    with path.open("rb") as stream:
        for block in iter(lambda: stream.read(BLOCK_BYTES), b""):
            block = rest + block
            end = block.rfind(b"\n") + 1
            rest = block[end:]
            if end:
                yield block[:end]
    if rest:
        yield rest


def _newlines(path: Path, size: int) -> int:
    """Line breaks in the first `size` bytes of the file."""
    count = 0
    with path.open("rb") as stream:
        while size > 0:
            block = stream.read(min(BLOCK_BYTES, size))
            count += block.count(b"\n")
            size -= len(block)
    return count
