"""A data file is hashed once per (path, size, modification time): the build record remembers its
signature, so a command over unchanged data reads no file in full, and a changed file is still
loaded again. Counted by wrapping `builds.file_signature`, the one function that reads a whole file.
"""

from __future__ import annotations

import os

import pytest
from conftest import ORDERS_CSV, copy_demo, write_project
from sqlglot import exp

from featpipe import api
from featpipe.engines import builds


@pytest.fixture
def hashes(monkeypatch) -> list[str]:
    """The files hashed in full, in order."""
    read: list[str] = []
    real = builds.file_signature

    def counting(path):
        read.append(path.name)
        return real(path)

    monkeypatch.setattr(builds, "file_signature", counting)
    return read


def test_a_fit_over_unchanged_data_hashes_no_file(tmp_path, hashes):
    project = api.load_project(copy_demo("lease_default", tmp_path / "lease"))
    api.compute(project)
    assert hashes == ["leases.csv"]  # once for the load and the design tables' signatures together
    first = (project.root / "fitted" / "default_risk.yaml").read_text()

    hashes.clear()
    api.fit(project)
    api.refresh(project)
    assert hashes == []
    # Same data, same fit: the fitted file is the demo's own, byte for byte.
    assert (project.root / "fitted" / "default_risk.yaml").read_text() == first


def orders(project) -> list[tuple]:
    with api.connect(project) as engine:
        return engine.fetch(exp.select("order_id", "amount").from_("orders").order_by("order_id"))


def test_a_changed_file_is_still_detected(tmp_path, hashes):
    project = api.load_project(write_project(tmp_path / "shop"))
    data = project.root / "data" / "orders.csv"
    api.compute(project)
    assert orders(project)[0] == (1, 120.5)

    # The same size, new bytes and a new modification time: hashed again and loaded.
    data.write_text(ORDERS_CSV.replace("120.5", "121.5"), encoding="utf-8")
    status = data.stat()
    os.utime(data, ns=(status.st_atime_ns, status.st_mtime_ns + 1_000_000_000))
    hashes.clear()
    said: list[str] = []
    api.compute(project, progress=said.append)
    assert hashes == ["orders.csv"]
    assert any(line.startswith("loading data/orders.csv") for line in said)
    assert orders(project)[0] == (1, 121.5)

    # Touched, not changed: hashed once, not loaded again, and remembered from then on.
    os.utime(data, ns=(status.st_atime_ns, status.st_mtime_ns + 2_000_000_000))
    hashes.clear()
    said.clear()
    api.compute(project, progress=said.append)
    assert hashes == ["orders.csv"] and not any(line.startswith("loading") for line in said)
    hashes.clear()
    api.compute(project)
    assert hashes == []
