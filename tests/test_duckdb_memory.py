"""The DuckDB adapter caps DuckDB's memory and gives it a temporary folder beside the database file, so
a step that needs more memory spills to disk instead of growing the process (DuckDB's own default is
80% of the machine's RAM, which a profile query over 10M rows once used).

Reference: DuckDB's own settings (`current_setting`), and a spilling sort checked against numpy.
"""

from __future__ import annotations

import duckdb
import numpy as np
from sqlglot import exp

from featpipe.engines.duckdb import MEMORY_LIMIT, DuckDBEngine


def setting(engine: DuckDBEngine, name: str):
    return engine.fetch(exp.select(exp.Anonymous(this="current_setting", expressions=[exp.Literal.string(name)])))[0][0]


def test_the_adapter_sets_a_memory_limit_and_a_temporary_folder(tmp_path):
    expected = duckdb.connect(config={"memory_limit": MEMORY_LIMIT}).execute("SELECT current_setting('memory_limit')").fetchone()[0]
    default = duckdb.connect().execute("SELECT current_setting('memory_limit')").fetchone()[0]
    for read_only in (False, True):
        engine = DuckDBEngine(tmp_path / "build" / "project.duckdb", read_only=read_only)
        try:
            assert setting(engine, "memory_limit") == expected != default
            assert setting(engine, "temp_directory") == str(tmp_path / "build" / "project.duckdb.tmp")
        finally:
            engine.close()


def test_a_sort_larger_than_the_limit_spills_and_gives_the_same_answer(tmp_path):
    engine = DuckDBEngine(tmp_path / "project.duckdb")
    try:
        engine.connection.execute("SET memory_limit = '40MB'")  # far below what the sort holds in memory
        engine.connection.execute("SET threads = 1")
        values = engine.connection.execute(
            "SELECT v FROM (SELECT hash(i) % 1000003 AS v, i FROM range(3000000) t(i)) ORDER BY v, i").fetchnumpy()["v"]
        expected = np.sort(np.array([v for (v,) in duckdb.connect().execute(
            "SELECT hash(i) % 1000003 FROM range(3000000) t(i)").fetchall()], dtype=values.dtype))
        assert np.array_equal(values, expected)  # numpy's sort of the same values
    finally:
        engine.close()
