"""Write files so a reader never sees half of one: write a temporary sibling, then rename."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from .errors import FeatpipeError


def write_text_atomic(path: Path, text: str) -> None:
    """Replace `path` with `text` in one step; on any failure the old file is left untouched.

    The file takes the mode any tool's new file takes (0666 less the umask), not the private 0600
    that a temporary file is created with. A refusal of the system (a full disk, no permission) is a
    FeatpipeError naming the file.
    """
    try:
        _write(path, text)
    except OSError as error:
        raise FeatpipeError(f"cannot write {path}: {error.strerror or error}; the file was left as it was") from None


def _write(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.chmod(handle, 0o666 & ~_umask())
        with os.fdopen(handle, "w", encoding="utf-8", newline="\n") as stream:
            stream.write(text)
            stream.flush()
            os.fsync(stream.fileno())
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def _umask() -> int:
    """The process's umask (reading it means setting it, so it is set straight back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask
