"""The embedded default engine: a DuckDB database file inside the project's build folder.

DuckDB would cache table data and keep intermediate results in memory up to 80% of the machine's RAM;
the adapter caps its memory at `MEMORY_LIMIT` and gives it a temporary folder beside the database
file (`<file>.tmp`) to spill sorts, aggregates and joins to, so computing terms or profiles never
takes more memory than a streamed fit, and a table larger than memory still computes.

A Parquet file is loaded as a copy kept in a folder beside the database file (`<file>.files`) and a
view reading it: DuckDB reads Parquet about as fast as its own tables, so this spares rewriting every
row into the database (the larger part of `featpipe compute`, whose design table is the one table it
must write). The copy is a snapshot: the user's file may change or go away, and the view still reads
what was checked. The view names the copy by its absolute path, so any DuckDB session on the database
file reads it (exported scoring SQL run outside featpipe included); after the project folder moves the
view cannot be read, `describe` says the input is missing and `featpipe compute` loads the file again.
A CSV file, slow to parse again, is loaded as a table.
"""

from __future__ import annotations

import contextlib
import shutil
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import duckdb
import pyarrow as pa
from sqlglot import exp

from ..errors import EngineError
from ..sqlgen.common import render
from . import statements
from .base import Check
from .datafiles import check_data_file

if TYPE_CHECKING:
    import pandas as pd


MEMORY_LIMIT = "1GB"
COPY_MARK = "@"  # a kept Parquet copy is named `<table>@<token>.parquet`


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
        with self._translated():
            return self.connection.execute(self.render(statement))

    @contextlib.contextmanager
    def _translated(self) -> Iterator[None]:
        """DuckDB's errors as an EngineError with their first line."""
        try:
            yield
        except duckdb.Error as error:
            first_line = str(error).strip().splitlines()[0]
            raise EngineError(f"duckdb: {first_line}") from error

    def fetch(self, query: exp.Expression) -> list[tuple]:
        return self._run(query).fetchall()

    def fetch_frame(self, query: exp.Expression) -> pd.DataFrame:
        return self._run(query).df()

    def fetch_table(self, query: exp.Expression) -> pa.Table:
        with self._translated():
            return self.connection.sql(self.render(query)).to_arrow_table()

    def fetch_batches(self, query: exp.Expression, batch_rows: int) -> Iterator[pa.RecordBatch]:
        # A relation streams its result; an executed result (DuckDB 2 has no fetch_record_batch) would
        # first fetch every row.
        with self._translated():
            reader = self.connection.sql(self.render(query)).to_arrow_reader(batch_rows)
        yield from reader

    def execute(self, statement: exp.Expression) -> None:
        self._run(statement)

    def create_table(self, name: str, query: exp.Query, check: Check | None = None) -> None:
        self._build_then_swap(name, "TABLE", query, check)
        self._remove_copies(name)  # it may have replaced a view over a kept Parquet copy

    def _build_then_swap(self, name: str, kind: str, query: exp.Query, check: Check | None) -> None:
        """Create `name` as a TABLE or VIEW of `query` under a temporary name, check it, then swap it in."""
        building = statements.building_name(name)
        self._drop(building)
        try:
            self._run(statements.create_table_as(building, query, kind))
            if check is not None:
                check(building)
            self.connection.begin()
            self._drop(name)
            self._run(statements.rename_table(building, name, kind))
            self.connection.commit()
        except BaseException:
            with contextlib.suppress(duckdb.Error):  # no transaction was open yet
                self.connection.rollback()
            self._drop(building)
            raise

    def load_file(self, name: str, path: Path, check: Check | None = None) -> None:
        check_data_file(path, self.name)
        parquet = path.suffix.lower() == ".parquet"
        kept = self._copies_folder() / f"{name}{COPY_MARK}{uuid.uuid4().hex}.parquet" if parquet and self.path else None
        try:
            if kept is not None:
                kept.parent.mkdir(exist_ok=True)
                shutil.copyfile(path, kept)
            read = str(kept if kept is not None else path)
            source = exp.Anonymous(this="read_parquet" if parquet else "read_csv", expressions=[exp.Literal.string(read)])
            if kept is not None:
                self._build_then_swap(name, "VIEW", exp.select(exp.Star()).from_(source), check)
            else:
                self.create_table(name, exp.select(exp.Star()).from_(source), check)
        except BaseException as error:
            if kept is not None:  # nothing reads it: the old table or view is still in place
                kept.unlink(missing_ok=True)
            if isinstance(error, EngineError):  # DuckDB's CSV errors give the line but not the file
                raise EngineError(f"duckdb: cannot load {path}: {str(error).removeprefix('duckdb: ')}") from error
            raise
        self._remove_copies(name, keep=kept)

    def describe(self, name: str) -> dict[str, exp.DataType] | None:
        query = (
            exp.select("column_name", "data_type")
            .from_(exp.to_table("information_schema.columns"))
            .where(exp.column("table_name").eq(exp.Literal.string(name)))
            .order_by("ordinal_position")
        )
        rows = self.fetch(query)
        if not rows or (self._kind(name) == "VIEW" and not self._readable(name)):
            return None
        return {column: exp.DataType.build(kind, dialect=self.dialect) for column, kind in rows}

    def _readable(self, name: str) -> bool:
        """Whether the view `name` can be read: one over a kept Parquet copy cannot once the copy is gone."""
        try:
            self._run(statements.select_all(name, limit=0))
        except EngineError:
            return False
        return True

    def drop_table(self, name: str) -> None:
        """Drop `name`, a table or a view over a kept Parquet copy (then the copy too), if it exists."""
        self._drop(name)
        self._remove_copies(name)

    def _drop(self, name: str) -> None:
        kind = self._kind(name)
        if kind is not None:
            self._run(statements.drop_table(name, kind))

    def _kind(self, name: str) -> str | None:
        """"VIEW" or "TABLE" for the relation `name`, None when there is none."""
        query = (
            exp.select("table_type")
            .from_(exp.to_table("information_schema.tables"))
            .where(exp.column("table_name").eq(exp.Literal.string(name)))
        )
        rows = self.fetch(query)
        if not rows:
            return None
        return "VIEW" if rows[0][0] == "VIEW" else "TABLE"

    def _copies_folder(self) -> Path:
        return self.path.absolute().with_name(self.path.name + ".files")

    def _copies(self, name: str) -> list[Path]:
        folder = self._copies_folder() if self.path is not None else None
        if folder is None or not folder.is_dir():
            return []
        return [copy for copy in folder.glob("*.parquet") if copy.stem.rpartition(COPY_MARK)[0] == name]

    def _remove_copies(self, name: str, keep: Path | None = None) -> None:
        """Delete the kept copies of `name` except `keep`: the one its view reads now, if any."""
        for copy in self._copies(name):
            if copy != keep:
                copy.unlink(missing_ok=True)

    @contextlib.contextmanager
    def beside(self) -> Iterator[None]:
        """None: DuckDB works in this process, on the cores a fit already keeps busy (its stream and numpy).
        Measured with a second connection: a 1M-row lease fit took 3.8-3.9 s against 3.1-3.6 s."""
        yield None

    def close(self) -> None:
        self.connection.close()
