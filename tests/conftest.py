"""Shared test helpers: small projects written to temporary folders, and the demo projects."""

from __future__ import annotations

import contextlib
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from typer.testing import CliRunner

pytest_plugins = ["fixtures_engines"]

# The tests run many short Spark jobs over a few thousand rows, where the JVM spends its time compiling
# rather than running: its quick compiler alone starts each job sooner (fitting the lease demo's 1,000
# generated rows: 15.5 s against 24.9 s). Set for every Spark JVM the tests start, in this process and
# in the commands and benchmarks they run; featpipe itself leaves the JVM's defaults alone.
os.environ.setdefault("PYSPARK_SUBMIT_ARGS", "--conf spark.driver.defaultJavaOptions=-XX:TieredStopAtLevel=1 pyspark-shell")

REPO = Path(__file__).resolve().parent.parent
DEMOS = REPO / "projects"

PROJECT_YAML = """\
name: shop
engine:
  kind: duckdb
  path: build/shop.duckdb
inputs:
  orders:
    key: order_id
    load: data/orders.csv
    columns:
      order_id: BIGINT
      amount: DOUBLE
      items: BIGINT
      region: VARCHAR
      returned: BIGINT
"""

ORDERS_CSV = """\
order_id,amount,items,region,returned
1,120.5,3,north,0
2,80.0,0,south,1
3,15.25,1,north,0
4,300.0,6,east,1
5,42.0,2,south,0
6,,2,north,0
7,99.9,4,east,1
8,10.0,1,south,0
"""

TERMS_SQL = """\
-- Terms about the basket.
SELECT
  -- Average price of one item.
  amount / NULLIF(items, 0) AS item_price,
  CASE WHEN region = 'north' THEN 1 ELSE 0 END AS northern
FROM orders
"""

MODEL_YAML = """\
input: orders
target: returned
family: binomial
terms: [item_price, northern, items]
"""


def write_project(root: Path, files: dict[str, str | None] | None = None) -> Path:
    """A small valid project in `root`; `files` adds or replaces files (None removes one)."""
    layout = {
        "featpipe.yaml": PROJECT_YAML,
        "data/orders.csv": ORDERS_CSV,
        "terms/basket.sql": TERMS_SQL,
        "specs/returns.yaml": MODEL_YAML,
    }
    layout.update(files or {})
    for relative, text in layout.items():
        path = root / relative
        if text is None:
            path.unlink(missing_ok=True)
            continue
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(text), encoding="utf-8")
    return root


@pytest.fixture
def project_dir(tmp_path: Path) -> Path:
    return write_project(tmp_path / "shop")


def copy_demo(name: str, destination: Path) -> Path:
    """A private copy of a demo project (without its build folder) that a test may change."""
    target = destination / name
    shutil.copytree(DEMOS / name, target, ignore=shutil.ignore_patterns("build"))
    return target


def run_featpipe(*args: str, cwd: Path | None = None, env: dict[str, str] | None = None) -> subprocess.CompletedProcess:
    """`featpipe ARGS` in this process, through the console entry point `featpipe.cli.main`, so the exit
    status, standard output and standard error are the ones a user sees, without a new interpreter's start."""
    from featpipe.cli import main

    with CliRunner().isolation(env={"FEATPIPE_DEBUG": "", **(env or {})}) as (stdout, stderr, _mixed), \
            contextlib.chdir(cwd or Path.cwd()):
        try:
            main(list(args))
        except SystemExit as done:  # main always exits, as the process would
            status = done.code
        sys.stdout.flush()
        sys.stderr.flush()
        return subprocess.CompletedProcess(["featpipe", *args], status, stdout.getvalue().decode(), stderr.getvalue().decode())


def table_row_counts(database: Path | None = None, connection=None) -> dict[str, int]:
    """Every table of a DuckDB database (a file, opened read-only, or an open connection) with its row
    count: what a refused command must leave exactly as it was."""
    import duckdb

    if connection is None:
        with duckdb.connect(str(database), read_only=True) as opened:
            return table_row_counts(connection=opened)
    names = [name for (name,) in connection.execute("SELECT table_name FROM information_schema.tables").fetchall()]
    return {name: connection.table(name).count("*").fetchall()[0][0] for name in sorted(names)}
