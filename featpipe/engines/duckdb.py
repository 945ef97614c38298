"""The embedded default engine: a DuckDB database file inside the project's build folder.

DuckDB would cache table data and keep intermediate results in memory up to 80% of the machine's RAM;
the adapter caps its memory at `MEMORY_LIMIT` and gives it a temporary folder beside the database
file (`<file>.tmp`) to spill sorts, aggregates and joins to, so computing terms or profiles never
takes more memory than a streamed fit, and a table larger than memory still computes.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from pathlib import Path

import duckdb
import pandas as pd
import pyarrow as pa
from sqlglot import exp

from ..errors import EngineError
from ..sqlgen.common import render
from . import statements
from .base import Check
from .datafiles import check_data_file


MEMORY_LIMIT = "1GB"


class DuckDBEngine:
    name = "duckdb"
    dialect = "duckdb"

    def __init__(self, path: Path | str | None = None, *, read_only: bool = False):
        """Open `path` (None: an in-memory database). A file held by another process is a clear error."""
        self.path = Path(path) if path is not None else None
        target = ":memory:"
        config = {"memory_limit": MEMORY_LIMIT}
        if self.path is not None:
            if not read_only:
                self.path.parent.mkdir(parents=True, exist_ok=True)
            target = str(self.path)
            config["temp_directory"] = str(self.path.with_name(self.path.name + ".tmp"))
        try:
            self.connection = duckdb.connect(target, read_only=read_only, config=config)
        except duckdb.IOException as error:
            if "lock" in str(error).lower():
                raise EngineError(
                    f"duckdb: the database {self.path} is in use by another process; "
                    "close the other featpipe or DuckDB session and try again"
                ) from error
            raise EngineError(f"duckdb: cannot open {self.path}: {error}") from error

    def render(self, statement: exp.Expression) -> str:
        return render(statement, self.dialect)

    def _run(self, statement: exp.Expression):
        try:
            return self.connection.execute(self.render(statement))
        except duckdb.Error as error:
            first_line = str(error).strip().splitlines()[0]
            raise EngineError(f"duckdb: {first_line}") from error

    def fetch(self, query: exp.Expression) -> list[tuple]:
        return self._run(query).fetchall()

    def fetch_frame(self, query: exp.Expression) -> pd.DataFrame:
        return self._run(query).df()

    def fetch_batches(self, query: exp.Expression, batch_rows: int) -> Iterator[pa.RecordBatch]:
        # A relation streams its result; an executed result (DuckDB 2 has no fetch_record_batch) would
        # first fetch every row.
        try:
            reader = self.connection.sql(self.render(query)).to_arrow_reader(batch_rows)
        except duckdb.Error as error:
            first_line = str(error).strip().splitlines()[0]
            raise EngineError(f"duckdb: {first_line}") from error
        yield from reader

    def execute(self, statement: exp.Expression) -> None:
        self._run(statement)

    def create_table(self, name: str, query: exp.Query, check: Check | None = None) -> None:
        building = statements.building_name(name)
        self._run(statements.drop_table(building))
        try:
            self._run(statements.create_table_as(building, query))
            if check is not None:
                check(building)
            self.connection.begin()
            self._run(statements.drop_table(name))
            self._run(statements.rename_table(building, name))
            self.connection.commit()
        except BaseException:
            with contextlib.suppress(duckdb.Error):  # no transaction was open yet
                self.connection.rollback()
            self._run(statements.drop_table(building))
            raise

    def load_file(self, name: str, path: Path, check: Check | None = None) -> None:
        check_data_file(path, self.name)
        reader = "read_parquet" if path.suffix.lower() == ".parquet" else "read_csv"
        source = exp.Anonymous(this=reader, expressions=[exp.Literal.string(str(path))])
        try:
            self.create_table(name, exp.select(exp.Star()).from_(source), check)
        except EngineError as error:  # DuckDB's CSV errors give the line but not the file
            raise EngineError(f"duckdb: cannot load {path}: {str(error).removeprefix('duckdb: ')}") from error

    def describe(self, name: str) -> dict[str, exp.DataType] | None:
        query = (
            exp.select("column_name", "data_type")
            .from_(exp.to_table("information_schema.columns"))
            .where(exp.column("table_name").eq(exp.Literal.string(name)))
            .order_by("ordinal_position")
        )
        rows = self.fetch(query)
        if not rows:
            return None
        return {column: exp.DataType.build(kind, dialect=self.dialect) for column, kind in rows}

    def drop_table(self, name: str) -> None:
        self._run(statements.drop_table(name))

    def close(self) -> None:
        self.connection.close()
