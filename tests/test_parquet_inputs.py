"""A Parquet `load:` file in the project's DuckDB: kept as a copy beside the database and read through a
view, so `featpipe compute` writes only the design table, with the same checks and the same atomic swap.

Every case runs through the API on a small project (tests/conftest.py) whose orders are written as
Parquet with pandas; the expected rows are the CSV text the project was written with (ORDERS_CSV).
"""

from __future__ import annotations

import io
import shutil

import duckdb
import pandas as pd
import pytest
from conftest import ORDERS_CSV, PROJECT_YAML, write_project
from sqlglot import exp

from featpipe import api
from featpipe.engines import statements
from featpipe.errors import FeatpipeError
from featpipe.sqlgen.common import column

FIX = "fix the data or declare another key in featpipe.yaml"


def parquet_shop(root) -> api.Project:
    """The conftest shop project with its orders as data/orders.parquet."""
    write_project(root, {"featpipe.yaml": PROJECT_YAML.replace("data/orders.csv", "data/orders.parquet")})
    write_orders(root, ORDERS_CSV)
    return api.load_project(root)


def write_orders(root, text: str) -> None:
    pd.read_csv(io.StringIO(text)).astype({"order_id": "Int64"}).to_parquet(root / "data" / "orders.parquet", index=False)


def orders_in_engine(project: api.Project) -> list[tuple]:
    with api.connect(project) as engine:
        query = exp.select(column("order_id"), column("amount"), column("region")).from_("orders").order_by(column("order_id"))
        return engine.fetch(query)


def relation_kinds(project: api.Project) -> dict[str, str]:
    """Each relation of the project's DuckDB file with its kind, read by DuckDB itself."""
    with duckdb.connect(str(project.root / "build" / "shop.duckdb"), read_only=True) as connection:
        return dict(connection.execute("SELECT table_name, table_type FROM information_schema.tables").fetchall())


def copies(project: api.Project) -> list[str]:
    folder = project.root / "build" / "shop.duckdb.files"
    return sorted(path.name for path in folder.iterdir()) if folder.is_dir() else []


# The rows of ORDERS_CSV (tests/conftest.py), as DuckDB returns them.
EXPECTED = [(1, 120.5, "north"), (2, 80.0, "south"), (3, 15.25, "north"), (4, 300.0, "east"),
            (5, 42.0, "south"), (6, None, "north"), (7, 99.9, "east"), (8, 10.0, "south")]


def test_a_parquet_input_is_a_view_over_a_kept_copy_that_outlives_the_file_and_any_session_reads(tmp_path, monkeypatch):
    project = parquet_shop(tmp_path / "shop")

    assert [(table.table, table.rows) for table in api.compute(project)] == [("design_returns", 8)]

    assert relation_kinds(project) == {"orders": "VIEW", "design_returns": "BASE TABLE", "featpipe_builds": "BASE TABLE"}
    (kept,) = copies(project)
    assert kept.startswith("orders@") and kept.endswith(".parquet")
    (project.root / "data" / "orders.parquet").unlink()  # a snapshot: the user's file may go away
    assert orders_in_engine(project) == EXPECTED
    monkeypatch.chdir(tmp_path)  # a plain DuckDB session elsewhere, as exported scoring SQL is run outside featpipe
    with duckdb.connect(str(project.root / "build" / "shop.duckdb"), read_only=True) as connection:
        assert connection.execute("SELECT order_id, amount, region FROM orders ORDER BY order_id").fetchall() == EXPECTED

    # A moved project cannot read the old copy: compute sees the input missing and loads the file again.
    write_orders(project.root, ORDERS_CSV)
    moved = api.load_project(shutil.move(project.root, tmp_path / "moved"))
    assert [(table.table, table.rows) for table in api.compute(moved)] == [("design_returns", 8)]
    assert orders_in_engine(moved) == EXPECTED

    # The same input loaded from a CSV file again is a table, and the copy is gone.
    (moved.root / "featpipe.yaml").write_text(PROJECT_YAML)
    api.compute(api.load_project(moved.root))
    assert relation_kinds(moved)["orders"] == "BASE TABLE"
    assert copies(moved) == []
    assert orders_in_engine(moved) == EXPECTED


@pytest.mark.parametrize(("keys", "message"), [
    ((9, 2, 3, 2, 5, 3, 7, 3, 5, 9, 8), f"data/orders.parquet: key order_id is not unique: 4 keys appear more than once (e.g. 2, 3, 5); {FIX}"),
    ((1, None, 4, None), f"data/orders.parquet: key order_id is NULL on 2 rows; {FIX}"),
])
def test_a_refused_parquet_file_keeps_the_old_view_and_its_copy_only(keys, message, tmp_path):
    project = parquet_shop(tmp_path / "shop")
    api.compute(project)
    before = copies(project)
    assert len(before) == 1
    bad = "order_id,amount,items,region,returned\n" + "".join(
        f"{'' if key is None else key},1.0,1,west,0\n" for key in keys)
    write_orders(project.root, bad)

    with pytest.raises(FeatpipeError) as refused:
        api.compute(project)

    assert str(refused.value) == message  # the words of the CSV route (tests/test_loads.py)
    assert copies(project) == before
    assert orders_in_engine(project) == EXPECTED
    assert statements.building_name("orders") not in relation_kinds(project)


@pytest.mark.parametrize("loss", ["kept copies deleted", "input table dropped"])
def test_an_unchanged_file_whose_input_is_gone_from_the_engine_is_loaded_again(loss, tmp_path):
    project = parquet_shop(tmp_path / "shop")
    if loss == "input table dropped":  # the CSV route: a table, dropped by hand
        (project.root / "featpipe.yaml").write_text(PROJECT_YAML)
        project = api.load_project(project.root)
    api.compute(project)
    if loss == "kept copies deleted":
        shutil.rmtree(project.root / "build" / "shop.duckdb.files")
    else:
        with api.connect(project) as engine:
            engine.drop_table("orders")

    assert [(table.table, table.rows) for table in api.compute(project)] == [("design_returns", 8)]

    assert orders_in_engine(project) == EXPECTED
