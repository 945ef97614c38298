"""Where inputs come from: `load:` files inside or outside the project, and inputs no model trains on."""

from __future__ import annotations

import shutil

from conftest import ORDERS_CSV, PROJECT_YAML, table_row_counts, write_project

from featpipe import api
from featpipe.project import load_project

ORDER_ROWS = len(ORDERS_CSV.splitlines()) - 1


def test_an_absolute_load_path_outside_the_project_is_loaded(tmp_path):
    shared = tmp_path / "shared" / "orders.csv"
    shared.parent.mkdir()
    shared.write_text(ORDERS_CSV)
    root = write_project(tmp_path / "shop", {"featpipe.yaml": PROJECT_YAML.replace("load: data/orders.csv", f"load: {shared}"),
                                             "data/orders.csv": None})
    (built,) = api.compute(load_project(root))
    assert built.rows == ORDER_ROWS


def test_a_home_relative_load_path_is_loaded(tmp_path, monkeypatch):
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    (tmp_path / "home" / "data").mkdir(parents=True)
    (tmp_path / "home" / "data" / "orders.csv").write_text(ORDERS_CSV)
    root = write_project(tmp_path / "shop", {"featpipe.yaml": PROJECT_YAML.replace("load: data/orders.csv", "load: ~/data/orders.csv"),
                                             "data/orders.csv": None})
    (built,) = api.compute(load_project(root))
    assert built.rows == ORDER_ROWS


def test_compute_loads_an_input_no_model_trains_on(tmp_path):
    """A declared batch with a `load:` file is in the engine after compute, ready to be scored."""
    batch = PROJECT_YAML.split("inputs:\n")[1].replace("  orders:", "  new_orders:").replace("data/orders.csv", "data/new_orders.csv")
    root = write_project(tmp_path / "shop", {"featpipe.yaml": PROJECT_YAML + batch})
    shutil.copy(root / "data" / "orders.csv", root / "data" / "new_orders.csv")
    api.compute(load_project(root))
    assert table_row_counts(root / "build" / "shop.duckdb")["new_orders"] == ORDER_ROWS
