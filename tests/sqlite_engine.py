"""SQLite through Python's sqlite3: a second embedded engine for parity checks of generated SQL.

It is not a project engine kind; tests use it to show that the same trees give the same answers on an
engine with very different typing. SQLite has no MD5, so one is registered (lowercase hex, like DuckDB,
PostgreSQL and Spark) for the holdout split. Builds without the math functions (SQLite before 3.35, or
compiled without SQLITE_ENABLE_MATH_FUNCTIONS) get Python versions of LN, EXP, SQRT, POWER, LOG10, FLOOR and CEIL
that follow SQLite's own rules: NULL outside the domain or for a NaN result, +-inf on overflow.
"""

from __future__ import annotations

import contextlib
import hashlib
import math
import sqlite3
from collections.abc import Callable, Iterator
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from sqlglot import exp
from sqlglot.dialects.sqlite import SQLite

from featpipe.engines import statements
from featpipe.engines.arrowfile import open_arrow_file, sql_type
from featpipe.engines.base import Check
from featpipe.sqlgen.dates import for_dialect
from featpipe.errors import EngineError
from featpipe.sqlgen.common import materialized

MATH_FUNCTIONS = ("ln", "exp", "sqrt", "power", "log10", "floor", "ceil")


class BacktickSQLite(SQLite):
    """SQLite SQL with identifiers in backticks. SQLite reads a double-quoted name that matches no
    column as a string literal, so `SELECT "no_such_column"` would quietly succeed; a backticked name
    is always an identifier."""

    class Tokenizer(SQLite.Tokenizer):
        IDENTIFIERS = ["`", '"']


class SQLiteEngine:
    name = "sqlite"
    dialect = "sqlite"

    def __init__(self, path: Path | str | None = None, *, python_math: bool = False):
        """Open `path` (None: in memory). `python_math` registers the Python math functions even where
        SQLite has its own, so tests can check the fallbacks against the built-ins."""
        self.path = Path(path) if path is not None else None
        if self.path is not None:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        try:
            # isolation_level=None: no implicit transactions; create_table opens its own.
            self.connection = sqlite3.connect(str(self.path or ":memory:"), isolation_level=None)
        except sqlite3.Error as error:
            raise EngineError(f"sqlite: cannot open {self.path}: {error}") from None
        self.connection.create_function("md5", 1, _md5, deterministic=True)
        missing = MATH_FUNCTIONS if python_math else self._missing_math_functions()
        for name in missing:
            function = FALLBACKS[name]
            self.connection.create_function(name, function.__code__.co_argcount, function, deterministic=True)
        self.python_math = tuple(missing)  # which math functions are Python fallbacks here

    def _missing_math_functions(self) -> tuple[str, ...]:
        query = exp.select("name").from_(exp.to_table("pragma_function_list"))
        try:
            present = {row[0].lower() for row in self.connection.execute(self.render(query))}
        except sqlite3.Error:  # builds before 3.30 have no pragma_function_list (and no math functions)
            present = set()
        return tuple(name for name in MATH_FUNCTIONS if name not in present)

    def render(self, statement: exp.Expression) -> str:
        return materialized(for_dialect(statement, "sqlite")).sql(dialect=BacktickSQLite, identify=True)  # as featpipe renders for SQLite

    def _run(self, statement: exp.Expression, parameters=()) -> sqlite3.Cursor:
        try:
            return self.connection.execute(self.render(statement), parameters)
        except sqlite3.Error as error:
            raise EngineError(f"sqlite: {error}") from None

    def fetch(self, query: exp.Expression) -> list[tuple]:
        return self._run(query).fetchall()

    def fetch_frame(self, query: exp.Expression) -> pd.DataFrame:
        cursor = self._run(query)
        return pd.DataFrame(cursor.fetchall(), columns=[column[0] for column in cursor.description])

    def fetch_table(self, query: exp.Expression) -> pa.Table:
        return pa.Table.from_pandas(self.fetch_frame(query), preserve_index=False)

    def fetch_batches(self, query: exp.Expression, batch_rows: int) -> Iterator[pa.RecordBatch]:
        """Arrow types follow each batch's values: SQLite query results have no column types."""
        cursor = self._run(query)
        names = [column[0] for column in cursor.description]
        while rows := cursor.fetchmany(batch_rows):
            yield pa.record_batch([pa.array([row[i] for row in rows]) for i in range(len(names))], names=names)

    def execute(self, statement: exp.Expression) -> None:
        self._run(statement)

    def create_table(self, name: str, query: exp.Query, check: Check | None = None) -> None:
        self._build_then_swap(name, lambda building: self._run(statements.create_table_as(building, query)), check)

    def load_file(self, name: str, path: Path, check: Check | None = None) -> None:
        data = open_arrow_file(path, self.name)

        def build(building: str) -> None:
            columns = [
                exp.ColumnDef(this=exp.to_identifier(field.name, quoted=True), kind=sql_type(field.type))
                for field in data.schema
            ]
            self._run(exp.Create(this=exp.Schema(this=exp.to_table(building), expressions=columns), kind="TABLE"))
            insert = self.render(
                exp.insert(exp.values([tuple(exp.Placeholder() for _ in data.schema)]), exp.to_table(building))
            )
            for batch in data.batches:
                try:
                    self.connection.executemany(insert, _sqlite_rows(batch))
                except sqlite3.Error as error:
                    raise EngineError(f"sqlite: cannot load {path}: {error}") from None

        self._build_then_swap(name, build, check)

    def _build_then_swap(self, name: str, build: Callable[[str], None], check: Check | None) -> None:
        """Build under the building name, check it and swap in one transaction; any failure rolls all of it back."""
        building = statements.building_name(name)
        self._run(exp.Transaction())
        try:
            self._run(statements.drop_table(building))
            build(building)
            if check is not None:
                check(building)
            self._run(statements.drop_table(name))
            self._run(statements.rename_table(building, name))
            self._run(exp.Commit())
        except BaseException:
            with contextlib.suppress(sqlite3.Error):
                self.connection.rollback()
            raise

    def describe(self, name: str) -> dict[str, exp.DataType] | None:
        info = exp.Anonymous(this="pragma_table_info", expressions=[exp.Literal.string(name)])
        rows = self.fetch(exp.select("name", "type").from_(info).order_by("cid"))
        if not rows:
            return None
        return {column: _declared_type(declared) for column, declared in rows}

    def drop_table(self, name: str) -> None:
        self._run(statements.drop_table(name))

    @contextlib.contextmanager
    def beside(self):
        yield None  # the tests' engine runs every query on its one connection

    def close(self) -> None:
        self.connection.close()


def _declared_type(declared: str) -> exp.DataType:
    """A column's declared type; names sqlglot does not know follow SQLite's affinity rules
    (https://www.sqlite.org/datatype3.html, section 3.1). No declared type (an expression column of
    CREATE TABLE AS) is UNKNOWN."""
    with contextlib.suppress(Exception):
        return exp.DataType.build(declared, dialect="sqlite")
    upper = declared.upper()
    if not upper or "BLOB" in upper:
        return exp.DataType.build("UNKNOWN")
    if "INT" in upper:
        return exp.DataType.build("BIGINT")
    if any(word in upper for word in ("CHAR", "CLOB", "TEXT")):
        return exp.DataType.build("TEXT")
    if any(word in upper for word in ("REAL", "FLOA", "DOUB")):
        return exp.DataType.build("DOUBLE")
    return exp.DataType.build("DECIMAL")


def _sqlite_rows(batch: pa.RecordBatch) -> Iterator[tuple]:
    """Rows sqlite3 can bind: dates and timestamps as ISO text, decimals as floats."""
    columns = []
    for column in batch.columns:
        if pa.types.is_temporal(column.type):
            column = pc.cast(column, pa.string())
        elif pa.types.is_decimal(column.type):
            column = pc.cast(column, pa.float64())
        columns.append(column.to_pylist())
    return zip(*columns) if columns else iter(())


def _md5(value) -> str | None:
    """MD5 as lowercase hex of the text's UTF-8 bytes (a BLOB: its bytes), as the other engines give it."""
    if value is None:
        return None
    data = value if isinstance(value, bytes) else str(value).encode("utf-8")
    return hashlib.md5(data).hexdigest()


def _real(value) -> float | None:
    """SQLite's numeric view of an argument: numbers and numeric text; anything else is NULL."""
    if isinstance(value, bool | int | float):
        return float(value)
    if isinstance(value, str):
        with contextlib.suppress(ValueError):
            return float(value)
    return None


def _result(value: float) -> float | None:
    return None if math.isnan(value) else value


def _ln(x):
    x = _real(x)
    return math.log(x) if x is not None and x > 0 else None


def _log10(x):
    x = _real(x)
    return math.log10(x) if x is not None and x > 0 else None


def _sqrt(x):
    x = _real(x)
    return math.sqrt(x) if x is not None and x >= 0 else None


def _exp(x):
    x = _real(x)
    if x is None:
        return None
    try:
        return _result(math.exp(x))
    except OverflowError:
        return math.inf


def _power(x, y):
    x, y = _real(x), _real(y)
    if x is None or y is None:
        return None
    odd_integer = y.is_integer() and int(y) % 2 == 1
    try:
        return _result(math.pow(x, y))
    except OverflowError:  # C pow overflows to an infinity with the sign of x**y
        return -math.inf if x < 0 and odd_integer else math.inf
    except ValueError:  # 0 to a negative power is an infinity in C; a negative base to a fraction is NaN
        if x == 0 and y < 0:
            return math.copysign(math.inf, x) if odd_integer else math.inf
        return None


def _floor(x):
    x = _real(x)
    return None if x is None else float(math.floor(x))


def _ceil(x):
    x = _real(x)
    return None if x is None else float(math.ceil(x))


FALLBACKS = {"ln": _ln, "exp": _exp, "sqrt": _sqrt, "power": _power, "log10": _log10, "floor": _floor, "ceil": _ceil}
