"""A PostgreSQL server reached with psycopg 3, using the engine block's DSN (or the PG* variables).

The connection runs in autocommit mode; `create_table` and `load_file` build the new table, drop the
old one and rename in ONE transaction, so readers see the old table or the new one, never neither.
Large results stream through a server-side cursor, so memory does not grow with rows.
"""

from __future__ import annotations

import contextlib
import copy
import getpass
import io
import os
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import pyarrow as pa
import pyarrow.csv as pacsv
from sqlglot import exp

from ..errors import EngineError
from ..project import EngineConfig
from ..sqlgen.common import render
from . import statements
from .arrowfile import open_arrow_file, sql_type
from .base import Check
from .pgbinary import binary_batches, fixed_width

try:  # the postgres extra is optional; the error says how to install it
    import psycopg
    from psycopg.types.numeric import FloatLoader
except ImportError:  # pragma: no cover - depends on the installation
    psycopg = None

if TYPE_CHECKING:
    import pandas as pd

MAX_NAME_BYTES = 63  # PostgreSQL silently truncates longer identifiers (NAMEDATALEN - 1)
FETCH_ROWS = 10_000

# Arrow types for the result columns featpipe produces, by PostgreSQL type OID (pg_type.dat).
_ARROW_TYPES = {
    16: pa.bool_(),  # bool
    20: pa.int64(),  # int8
    21: pa.int64(),  # int2
    23: pa.int64(),  # int4
    26: pa.int64(),  # oid
    700: pa.float64(),  # float4
    701: pa.float64(),  # float8
    1700: pa.float64(),  # numeric, loaded as float (see _float_numeric)
    25: pa.string(),  # text
    19: pa.string(),  # name
    1042: pa.string(),  # bpchar
    1043: pa.string(),  # varchar
    1082: pa.date32(),  # date
    1114: pa.timestamp("us"),  # timestamp
    1184: pa.timestamp("us", tz="UTC"),  # timestamptz
    17: pa.binary(),  # bytea
}


class PostgresEngine:
    name = "postgres"
    dialect = "postgres"

    def __init__(self, config: EngineConfig):
        """Connect with `config.dsn` ("" or None: libpq defaults and PGHOST/PGPORT/PGUSER/PGDATABASE)."""
        if psycopg is None:
            raise EngineError(
                "postgres: the psycopg package is not installed; install it with pip install 'featpipe[postgres]'"
            )
        self.dsn = config.dsn or ""
        try:
            self.connection = psycopg.connect(self.dsn, autocommit=True)
        except psycopg.Error as error:
            raise _connection_error(error, self.dsn) from error

    def render(self, statement: exp.Expression) -> str:
        return render(statement, self.dialect)

    @contextlib.contextmanager
    def _translated(self):
        """Turn psycopg errors raised inside the block into one-line EngineErrors."""
        try:
            yield
        except psycopg.Error as error:
            raise _statement_error(error, self.dsn) from error

    def _run(self, cursor, statement: exp.Expression) -> None:
        cursor.execute(self.render(statement))

    def fetch(self, query: exp.Expression) -> list[tuple]:
        with self._translated(), self.connection.cursor() as cursor:
            self._run(cursor, query)
            return cursor.fetchall()

    def fetch_frame(self, query: exp.Expression) -> pd.DataFrame:
        return self.fetch_table(query).to_pandas()

    def fetch_table(self, query: exp.Expression) -> pa.Table:
        with self._translated(), self.connection.cursor() as cursor:
            _float_numeric(cursor)
            self._run(cursor, query)
            schema = _arrow_schema(cursor.description)
            return pa.Table.from_batches([_record_batch(cursor.fetchall(), schema)])

    def fetch_batches(self, query: exp.Expression, batch_rows: int) -> Iterator[pa.RecordBatch]:
        """Numbers and booleans only: a binary COPY read with numpy (`pgbinary`), several times faster than
        rows through a cursor. Other columns: rows through a server-side cursor, NUMERIC as float64."""
        with self._translated(), self.connection.cursor() as cursor:
            self._run(cursor, exp.select(exp.Star()).from_(query.subquery("featpipe_result")).limit(0))
            names = [column.name for column in cursor.description]
            type_oids = [column.type_code for column in cursor.description]
        if fixed_width(type_oids):
            yield from self._copied_batches(query, names, type_oids, batch_rows)
        else:
            yield from self._cursor_batches(query, batch_rows)

    def _copied_batches(self, query: exp.Expression, names: list[str], type_oids: list[int], batch_rows: int):
        copy = exp.Copy(
            this=query.subquery(),
            kind=False,  # TO
            files=[exp.Var(this="STDOUT")],
            params=[exp.CopyParameter(this=exp.Var(this="FORMAT"), expression=exp.Var(this="BINARY"))],
        )
        with self._translated(), self.connection.cursor() as cursor, cursor.copy(self.render(copy)) as stream:
            yield from binary_batches(stream, names, type_oids, batch_rows)

    def _cursor_batches(self, query: exp.Expression, batch_rows: int):
        with (
            self._translated(),
            self.connection.transaction(),
            self.connection.cursor(name="featpipe_batches") as cursor,
        ):
            _float_numeric(cursor)
            self._run(cursor, query)
            schema = _arrow_schema(cursor.description)
            while rows := cursor.fetchmany(batch_rows):
                yield _record_batch(rows, schema)

    def execute(self, statement: exp.Expression) -> None:
        with self._translated(), self.connection.cursor() as cursor:
            self._run(cursor, statement)

    def create_table(self, name: str, query: exp.Query, check: Check | None = None) -> None:
        building = self._building_name(name)
        with self._translated(), self.connection.transaction(), self.connection.cursor() as cursor:
            self._run(cursor, statements.drop_table(building))
            self._run(cursor, statements.create_table_as(building, query))
            self._swap(cursor, building, name, check)

    def load_file(self, name: str, path: Path, check: Check | None = None) -> None:
        """CREATE TABLE from the file's Arrow schema, then COPY the rows in as CSV, all in one transaction."""
        data = open_arrow_file(path, self.name, FETCH_ROWS)
        building = self._building_name(name)
        columns = [exp.to_identifier(field.name, quoted=True) for field in data.schema]
        definition = exp.Schema(
            this=exp.to_table(building),
            expressions=[
                exp.ColumnDef(this=column, kind=sql_type(field.type)) for column, field in zip(columns, data.schema)
            ],
        )
        copy = exp.Copy(
            this=exp.Schema(this=exp.to_table(building), expressions=columns),
            kind=True,  # FROM
            files=[exp.Var(this="STDIN")],
            params=[exp.CopyParameter(this=exp.Var(this="FORMAT"), expression=exp.Var(this="csv"))],
        )
        with self._translated(), self.connection.transaction(), self.connection.cursor() as cursor:
            self._run(cursor, statements.drop_table(building))
            self._run(cursor, exp.Create(this=definition, kind="TABLE"))
            with cursor.copy(self.render(copy)) as stream:
                for batch in data.batches:
                    stream.write(_csv_bytes(batch))
            self._swap(cursor, building, name, check)

    def _swap(self, cursor, building: str, name: str, check: Check | None) -> None:
        """Run `check` on the building table (inside the transaction, which a failure rolls back), then swap."""
        if check is not None:
            check(building)
        self._run(cursor, statements.drop_table(name))
        self._run(cursor, statements.rename_table(building, name))

    def _building_name(self, name: str) -> str:
        building = statements.building_name(name)
        if len(building.encode()) > MAX_NAME_BYTES:
            room = MAX_NAME_BYTES - len(statements.BUILDING_SUFFIX)
            raise EngineError(
                f"postgres: table name '{name}' is too long; PostgreSQL keeps {MAX_NAME_BYTES} bytes of a name "
                f"and featpipe builds tables under a longer temporary name, so use at most {room} bytes"
            )
        return building

    def describe(self, name: str) -> dict[str, exp.DataType] | None:
        query = (
            exp.select("column_name", "data_type", "udt_name")
            .from_(exp.to_table("information_schema.columns"))
            .where(
                exp.and_(
                    exp.column("table_schema").eq(exp.CurrentSchema()),
                    exp.column("table_name").eq(exp.Literal.string(name)),
                )
            )
            .order_by("ordinal_position")
        )
        rows = self.fetch(query)
        if not rows:
            return None
        return {
            column: exp.DataType.build(
                udt_name if data_type in ("USER-DEFINED", "ARRAY") else data_type, dialect=self.dialect, udt=True
            )
            for column, data_type, udt_name in rows
        }

    def drop_table(self, name: str) -> None:
        self.execute(statements.drop_table(name))

    @contextlib.contextmanager
    def beside(self) -> Iterator[PostgresEngine]:
        """A second connection to the server (a psycopg connection runs one query at a time)."""
        twin = copy.copy(self)
        try:
            twin.connection = psycopg.connect(self.dsn, autocommit=True)
        except psycopg.Error as error:
            raise _connection_error(error, self.dsn) from error
        try:
            yield twin
        finally:
            twin.connection.close()

    def close(self) -> None:
        self.connection.close()


def _float_numeric(cursor) -> None:
    """Load NUMERIC as float on this cursor: frames and batches feed numeric code, not exact decimals."""
    cursor.adapters.register_loader("numeric", FloatLoader)


def _arrow_schema(description) -> pa.Schema:
    return pa.schema([pa.field(column.name, _ARROW_TYPES.get(column.type_code, pa.string())) for column in description])


def _record_batch(rows: list[tuple], schema: pa.Schema) -> pa.RecordBatch:
    columns = []
    for index, field in enumerate(schema):
        values = [row[index] for row in rows]
        if pa.types.is_string(field.type):  # also the fallback for types without an Arrow mapping
            values = [None if value is None else str(value) for value in values]
        columns.append(pa.array(values, type=field.type))
    return pa.record_batch(columns, schema=schema)


def _csv_bytes(batch: pa.RecordBatch) -> bytes:
    """One batch as CSV in the form COPY ... (FORMAT csv) reads: NULL unquoted and empty, text quoted."""
    columns = [_bytea_text(column) if pa.types.is_binary(column.type) else column for column in batch.columns]
    buffer = io.BytesIO()
    pacsv.write_csv(pa.record_batch(columns, names=batch.schema.names), buffer, pacsv.WriteOptions(include_header=False))
    return buffer.getvalue()


def _bytea_text(column: pa.Array) -> pa.Array:
    return pa.array([None if value is None else "\\x" + value.hex() for value in column.to_pylist()], pa.string())


def _server_address(dsn: str) -> str:
    """Where the DSN points (host:port, or libpq's local socket); never includes the password."""
    try:
        settings = psycopg.conninfo.conninfo_to_dict(dsn)
    except psycopg.Error:
        settings = {}
    host = settings.get("host") or os.environ.get("PGHOST")
    port = settings.get("port") or os.environ.get("PGPORT") or "5432"
    if not host:
        return f"the local socket for port {port} (no host in the dsn or PGHOST)"
    if str(host).startswith("/"):
        return f"the socket in {host} for port {port}"
    return f"{host}:{port}"


def _user(dsn: str) -> str:
    try:
        settings = psycopg.conninfo.conninfo_to_dict(dsn)
    except psycopg.Error:
        settings = {}
    return str(settings.get("user") or os.environ.get("PGUSER") or getpass.getuser())


def _connection_error(error: Exception, dsn: str) -> EngineError:
    text = str(error)
    where = _server_address(dsn)
    if isinstance(error, psycopg.ProgrammingError):  # libpq could not parse the DSN; do not echo it (password)
        return EngineError(
            "postgres: the engine dsn is not a valid connection string; use 'host=... port=... dbname=... user=...' "
            "or a postgresql:// URL"
        )
    if "password authentication failed" in text or "no password supplied" in text:
        return EngineError(
            f"postgres: password authentication failed for user '{_user(dsn)}' at {where}; "
            "check the user and password in the engine dsn or PGPASSWORD"
        )
    if "Connection refused" in text or ("No such file or directory" in text and "socket" in text):
        return EngineError(f"postgres: no server answers at {where}; is the server running?")
    if "timeout expired" in text:
        return EngineError(f"postgres: timed out connecting to {where}; check the host, the port and any firewall")
    return EngineError(f"postgres: cannot connect to {where}: {_message(error)}")


def _statement_error(error: Exception, dsn: str) -> EngineError:
    if isinstance(error, psycopg.errors.QueryCanceled):
        return EngineError(
            f"postgres: the statement was cancelled ({_message(error)}); raise statement_timeout "
            "(for example options='-c statement_timeout=10min' in the engine dsn) or make the query cheaper"
        )
    if isinstance(error, psycopg.OperationalError) and getattr(error, "sqlstate", None) is None:
        return EngineError(
            f"postgres: lost the connection to {_server_address(dsn)} ({_message(error)}); is the server still running?"
        )
    return EngineError(f"postgres: {_message(error)}")


def _message(error: Exception) -> str:
    """The server's primary message and hint on one line (client-side errors: their first line)."""
    diagnostic = getattr(error, "diag", None)
    primary = diagnostic.message_primary if diagnostic is not None else None
    if primary:
        hint = diagnostic.message_hint
        return f"{primary}; {hint}" if hint else primary
    text = str(error).strip()
    first = text.splitlines()[0] if text else type(error).__name__
    return first.removeprefix("connection failed: ")
