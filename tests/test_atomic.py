"""Files featpipe writes appear whole, and with the mode the user's umask gives any new file."""

from __future__ import annotations

import os
import stat

import pytest

from featpipe.atomic import write_text_atomic


@pytest.mark.parametrize(("umask", "mode"), [(0o022, 0o644), (0o077, 0o600), (0o002, 0o664)])
def test_a_written_file_takes_the_umask_mode_like_any_tool(tmp_path, umask, mode):
    """0666 less the umask is what open(2) gives a new file (POSIX); a temporary file would be 0600."""
    before = os.umask(umask)
    try:
        write_text_atomic(tmp_path / "fitted" / "model.yaml", "model: m\n")
    finally:
        os.umask(before)
    assert stat.S_IMODE((tmp_path / "fitted" / "model.yaml").stat().st_mode) == mode


def test_a_failed_write_leaves_the_old_file_and_no_temporary(tmp_path):
    path = tmp_path / "model.yaml"
    path.write_text("old\n")
    with pytest.raises(TypeError):
        write_text_atomic(path, None)  # not text: the write fails midway
    assert path.read_text() == "old\n"
    assert [p.name for p in tmp_path.iterdir()] == ["model.yaml"]
