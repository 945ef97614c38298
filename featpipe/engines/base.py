"""What every engine adapter offers. Nothing outside `featpipe.engines` talks to a database.

Adapters take sqlglot trees and render them in their own dialect; they never receive SQL text
built elsewhere. Table names are plain (unquoted) names; adapters quote them.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager
from pathlib import Path
from typing import TYPE_CHECKING, Protocol

from sqlglot import exp

if TYPE_CHECKING:  # only annotations: `featpipe check` never pays for pandas or Arrow
    import pandas as pd
    import pyarrow as pa

Check = Callable[[str], None]
"""Inspects a table about to be swapped in, given its temporary name; raising keeps the old table."""


class Engine(Protocol):
    name: str  # "duckdb", "postgres", "spark", "sqlite"
    dialect: str  # sqlglot dialect used to render statements for this engine

    def render(self, statement: exp.Expression) -> str:
        """The SQL text this engine runs for `statement`."""

    def fetch(self, query: exp.Expression) -> list[tuple]:
        """Run a query and return its rows (small results: statistics, metrics, profiles)."""

    def fetch_frame(self, query: exp.Expression) -> pd.DataFrame:
        """Run a query and return a pandas frame."""

    def fetch_table(self, query: exp.Expression) -> pa.Table:
        """Run a query and return its whole result as one Arrow table (small results: a fit's sample),
        with no pandas frame in between."""

    def fetch_batches(self, query: exp.Expression, batch_rows: int) -> Iterator[pa.RecordBatch]:
        """Stream a query's result as Arrow record batches of at most `batch_rows` rows."""

    def create_table(self, name: str, query: exp.Query, check: Check | None = None) -> None:
        """Build `name` from `query` under a temporary name, run `check` on it, then swap it in.

        A failure (of the build or of `check`) leaves any previous table `name` intact and no
        temporary table behind.
        """

    def load_file(self, name: str, path: Path, check: Check | None = None) -> None:
        """Load a CSV or Parquet file as table `name`, atomically like `create_table` (and checked like it).

        DuckDB keeps a Parquet file as a copy beside its database file and makes `name` a view reading it.

        A directory, a missing or empty file and a CSV that is not UTF-8 are refused naming the file
        (`datafiles.check_data_file`).
        """

    def describe(self, name: str) -> dict[str, exp.DataType] | None:
        """Column names and types of table `name`, or None when it does not exist (or, a view, cannot be read)."""

    def drop_table(self, name: str) -> None:
        """Drop table `name` if it exists."""

    def beside(self) -> AbstractContextManager[Engine | None]:
        """An engine for queries run on another thread while this one works: this engine over a second
        connection to the same database (closed on leaving), this engine itself where it takes queries
        from several threads, or None where running them meanwhile does not pay."""

    def close(self) -> None: ...

