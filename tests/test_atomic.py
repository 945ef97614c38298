"""Files featpipe writes appear whole, and with the mode the user's umask gives any new file."""

from __future__ import annotations

import errno
import os
import stat

import pytest
from conftest import copy_demo, run_featpipe

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


def test_a_full_disk_during_fit_is_one_line_and_keeps_the_fitted_file(tmp_path, monkeypatch):
    root = copy_demo("lease_default", tmp_path)
    fitted = root / "fitted" / "default_risk.yaml"
    before = fitted.read_bytes()
    fitted.write_bytes(before.replace(b"threshold: 0.2", b"threshold: 0.2 "))  # same content, other bytes
    kept = fitted.read_bytes()

    def full(descriptor):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fsync", full)
    result = run_featpipe("fit", "default_risk", "-p", str(root))
    assert result.returncode == 1
    assert result.stderr.splitlines()[-1] == (
        f"error: cannot write {fitted}: No space left on device; the file was left as it was")
    assert "Traceback" not in result.stderr + result.stdout
    assert fitted.read_bytes() == kept
    assert sorted(p.name for p in fitted.parent.iterdir()) == ["default_raw.yaml", "default_risk.yaml"]
