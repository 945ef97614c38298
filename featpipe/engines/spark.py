"""Apache Spark through PySpark: a local session by default, or Spark Connect when the engine block has a url.

One Spark session per process: an engine reuses the session that is already running (a notebook's, a
test run's), and only the engine that started a session stops it on close. A local session started
here keeps its warehouse and a Derby metastore in the folder of engine.path (the project's build
folder), so tables built by one featpipe command are there for the next; only one process at a time
can open that metastore. Spark has no transactions: a new table is built under the building name,
then the old one is dropped and the new one renamed; a failed build drops the building table. Every
engine raises its session's spark.sql.codegen.maxFields to CODEGEN_MAX_FIELDS, so featpipe's wide
aggregates run as generated code.
"""

from __future__ import annotations

import atexit
import contextlib
import logging
import shutil
import socket
import tempfile
import urllib.parse
import warnings
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import pyarrow as pa
from sqlglot import exp

from ..errors import EngineError
from ..sqlgen.common import render
from ..project import EngineConfig
from . import statements
from .base import Check
from .datafiles import check_data_file

if TYPE_CHECKING:
    import pandas as pd


@contextlib.contextmanager
def _quiet_pandas_check():
    """PySpark warns about the pandas major version when it starts; featpipe does not use PySpark's pandas code."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="PySpark does not yet fully support pandas", category=FutureWarning)
        yield


try:  # the spark extra is optional; the error says how to install it
    with _quiet_pandas_check():
        from py4j.protocol import Py4JError
        from pyspark.errors import PySparkException
        from pyspark.sql import SparkSession
        from pyspark.sql.pandas.types import to_arrow_schema
except ImportError:  # pragma: no cover - depends on the installation
    SparkSession = None


try:  # PySpark 4 logs every failed query with its JVM stack trace; the EngineError already says it
    from pyspark.logger import PySparkLogger

    for _logger in ("SQLQueryContextLogger", "DataFrameQueryContextLogger"):
        PySparkLogger.getLogger(_logger).setLevel(logging.CRITICAL)
except ImportError:  # pragma: no cover - PySpark 3.5 has no such loggers
    pass

try:
    import fcntl
except ImportError:  # pragma: no cover - Windows: Derby's own error reports a locked metastore
    fcntl = None

# Spark compiles a query stage into one Java method only while its rows have at most
# spark.sql.codegen.maxFields fields (100 by default); an IRLS pass of p terms sums about p^2 / 2
# products, so from 13 terms on the passes and the profiles' moments ran row by row, interpreted. Raised,
# on 700,000 rows a 13-term pass took 1.0-1.5 s instead of 3.4-5.9 s, the moments 1.4 s instead of
# 5.1 s, the 325 sums of 25 terms 3.2-3.9 s instead of 13-15 s, and the 1830 of 60 terms 91-95 s
# instead of 130-135 s (measured on this machine). A stage whose method outgrows
# spark.sql.codegen.hugeMethodLimit still falls back to the interpreted route by itself.
CODEGEN_MAX_FIELDS = 2000
WAREHOUSE_FOLDER = "spark-warehouse"
METASTORE_FOLDER = "spark-metastore"
CONNECT_DEFAULT_PORT = 15002


class SparkEngine:
    name = "spark"
    dialect = "spark"

    def __init__(self, config: EngineConfig):
        """Use the process's Spark session, starting one from `config` if none is running."""
        if SparkSession is None:
            raise EngineError("spark: the pyspark package is not installed; install it with pip install 'featpipe[spark]'")
        self.database = config.database
        already_running = SparkSession.getActiveSession()
        self.session = already_running or _start_session(config)
        self._owns_session = already_running is None
        with self._translated():
            _allow_wide_codegen(self.session)
            if self.database:
                self.session.sql(self.render(exp.Create(this=exp.to_table(self.database), kind="SCHEMA", exists=True)))
                self.session.sql(self.render(exp.Use(this=exp.to_identifier(self.database))))
            self.session.catalog.currentDatabase()  # opens the metastore now, so a locked one fails here

    def render(self, statement: exp.Expression) -> str:
        return render(statement, self.dialect)

    @contextlib.contextmanager
    def _translated(self):
        """Turn Spark and Py4J errors raised inside the block into one-line EngineErrors."""
        try:
            yield
        except (PySparkException, Py4JError) as error:
            raise _spark_error(error) from error

    def _frame(self, statement: exp.Expression):
        return self.session.sql(self.render(statement))

    def fetch(self, query: exp.Expression) -> list[tuple]:
        with self._translated():
            return [tuple(row) for row in self._frame(query).collect()]

    def fetch_frame(self, query: exp.Expression) -> pd.DataFrame:
        """Collected as Arrow and converted by pyarrow, like the other engines' frames."""
        return self.fetch_table(query).to_pandas()

    def fetch_table(self, query: exp.Expression) -> pa.Table:
        with self._translated():
            return self._frame(query).toArrow()

    def fetch_batches(self, query: exp.Expression, batch_rows: int) -> Iterator[pa.RecordBatch]:
        """Rows come to the driver one partition at a time (toLocalIterator), in batches of `batch_rows`."""
        with self._translated():
            frame = self._frame(query)
            schema = _arrow_schema(frame.schema)
            rows: list = []
            for row in frame.toLocalIterator():
                rows.append(row)
                if len(rows) == batch_rows:
                    yield _record_batch(rows, schema)
                    rows = []
            if rows:
                yield _record_batch(rows, schema)

    def execute(self, statement: exp.Expression) -> None:
        with self._translated():
            self._frame(statement)

    def create_table(self, name: str, query: exp.Query, check: Check | None = None) -> None:
        self._build_then_swap(name, lambda building: self._frame(statements.create_table_as(building, query)), check)

    def load_file(self, name: str, path: Path, check: Check | None = None) -> None:
        """Spark reads the file itself (on a Spark Connect server: the server's file system). featpipe checks
        it here first (`check_data_file`; compute hashes it here too), so with Spark Connect the file must be
        at the same path on both machines."""
        path = Path(path).resolve()
        check_data_file(path, self.name)

        def build(building: str) -> None:
            if path.suffix.lower() == ".parquet":
                frame = self.session.read.parquet(str(path))
            else:
                frame = self.session.read.csv(str(path), header=True, inferSchema=True)
            frame.write.saveAsTable(building)

        try:
            self._build_then_swap(name, build, check)
        except EngineError as error:  # Spark's reader errors do not name the file
            raise EngineError(f"spark: cannot load {path}: {str(error).removeprefix('spark: ')}") from error

    def _build_then_swap(self, name: str, build: Callable[[str], None], check: Check | None) -> None:
        building = statements.building_name(name)
        with self._translated():
            self._frame(statements.drop_table(building))
            try:
                build(building)
                if check is not None:
                    check(building)
                self._frame(statements.drop_table(name))
                self._frame(statements.rename_table(building, name))
            except BaseException:
                with contextlib.suppress(PySparkException, Py4JError):
                    self._frame(statements.drop_table(building))
                raise

    def describe(self, name: str) -> dict[str, exp.DataType] | None:
        with self._translated():
            if not self.session.catalog.tableExists(name):
                return None
            fields = self._frame(statements.select_all(name)).schema.fields
        return {
            field.name: exp.DataType.build(field.dataType.simpleString(), dialect=self.dialect, udt=True)
            for field in fields
        }

    def drop_table(self, name: str) -> None:
        with self._translated():
            self._frame(statements.drop_table(name))

    @contextlib.contextmanager
    def beside(self) -> Iterator[SparkEngine]:
        """This engine itself: a Spark session runs jobs sent from several threads side by side (a fit's
        profiles beside its passes: 1M rows, 75.8-81.1 s against 86.8-94.5 s)."""
        yield self

    def close(self) -> None:
        """Stop the session if this engine started it; a session found running belongs to its starter."""
        if self._owns_session:
            self.session.stop()
            self._owns_session = False


def _allow_wide_codegen(session) -> None:
    """Raise the session's spark.sql.codegen.maxFields to CODEGEN_MAX_FIELDS (never lower a higher one)."""
    key = "spark.sql.codegen.maxFields"
    if int(session.conf.get(key)) < CODEGEN_MAX_FIELDS:
        session.conf.set(key, str(CODEGEN_MAX_FIELDS))


def _start_session(config: EngineConfig):
    if config.url:
        check_connect_server(config.url)
        builder = SparkSession.builder.remote(config.url)
        where = f"Spark Connect at {config.url}"
    else:
        builder = (
            SparkSession.builder.master(config.master)
            .appName("featpipe")
            .config("spark.ui.enabled", "false")
            .config("spark.ui.showConsoleProgress", "false")
            .config("spark.sql.shuffle.partitions", "2")
            .config("spark.driver.bindAddress", "127.0.0.1")
            # Advertise the address it binds: a task result above spark.task.maxDirectResultSize (1 MB, e.g.
            # the fit's 100,000-row warm-start sample) is fetched from the block manager at the advertised
            # host, which defaults to the machine's name and fails with TaskResultLost when that is not loopback.
            .config("spark.driver.host", "127.0.0.1")
            .config("spark.sql.execution.arrow.pyspark.enabled", "true")
        )
        if config.path is not None:
            build_dir = Path(config.path).parent
            build_dir.mkdir(parents=True, exist_ok=True)
            metastore = build_dir / METASTORE_FOLDER
            check_metastore_free(metastore)
            builder = (
                builder.config("spark.sql.warehouse.dir", str(build_dir / WAREHOUSE_FOLDER))
                .config("spark.hadoop.javax.jdo.option.ConnectionURL", f"jdbc:derby:;databaseName={metastore};create=true")
                .config("spark.driver.extraJavaOptions", f"-Dderby.stream.error.file={build_dir / 'derby.log'}")
                .config("spark.hadoop.hive.hmshandler.retry.attempts", "1")  # a locked metastore fails at once
                .enableHiveSupport()
            )
        else:  # nothing to keep: tables live in memory and their files in a folder removed at exit
            warehouse = tempfile.mkdtemp(prefix="featpipe-spark-")
            atexit.register(shutil.rmtree, warehouse, ignore_errors=True)
            builder = builder.config("spark.sql.warehouse.dir", warehouse)
        where = f"a local Spark session (master {config.master})"
    try:
        with _quiet_pandas_check():
            session = builder.getOrCreate()
    except ImportError as error:  # Spark Connect's client packages (grpcio and friends) are optional
        raise EngineError(
            f"spark: Spark Connect needs more packages ({_first_line(error)}); "
            "install them with pip install 'pyspark[connect]'"
        ) from error
    except (PySparkException, Py4JError, OSError) as error:
        hint = "is the server running?" if config.url else "check that Java 17 or newer is installed (JAVA_HOME or java on PATH)"
        raise EngineError(f"spark: cannot start {where}: {_first_line(error)}; {hint}") from error
    if not config.url:
        session.sparkContext.setLogLevel("FATAL")  # failures reach the user as EngineErrors, not JVM logs
    return session


def check_connect_server(url: str) -> None:
    """Refuse at once when nothing listens at a sc://host:port URL; the client would retry for minutes."""
    address = urllib.parse.urlsplit(url.split(";")[0])
    if address.scheme != "sc" or not address.hostname:
        return
    port = address.port or CONNECT_DEFAULT_PORT
    try:
        socket.create_connection((address.hostname, port), timeout=10).close()
    except OSError as error:
        raise EngineError(
            f"spark: no Spark Connect server answers at {address.hostname}:{port} ({error.strerror or error}); "
            "is the server running?"
        ) from error


def check_metastore_free(metastore: Path) -> None:
    """Fail fast, before a JVM starts, when another process has the Derby metastore open.

    Derby holds an OS lock on dbex.lck while a database is booted; Hive would otherwise retry for
    about a minute and then report a generic error.
    """
    lock_file = metastore / "dbex.lck"
    if fcntl is None or not lock_file.is_file():
        return
    with open(lock_file, "rb+") as handle:
        try:
            fcntl.lockf(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            raise EngineError(
                f"spark: the local metastore {metastore} is in use by another process (another featpipe or Spark "
                "session on this project); close it and try again"
            ) from None
        fcntl.lockf(handle, fcntl.LOCK_UN)


def _spark_error(error: Exception) -> EngineError:
    text = str(error)
    if "SessionHiveMetaStoreClient" in text or "Another instance of Derby" in text:
        return EngineError(
            "spark: cannot open the local metastore (build folder, spark-metastore); another featpipe or Spark "
            "process on this project probably has it open: close it and try again"
        )
    return EngineError(f"spark: {_first_line(error)}")


def _first_line(error: Exception) -> str:
    """The first line of Spark's message; errors raised in a task carry the cause's error class further in."""
    text = str(error).strip()
    return text.splitlines()[0] if text else type(error).__name__


def _arrow_schema(schema) -> pa.Schema:
    """Arrow types for a Spark schema; timestamps stay naive, as collected rows give them."""
    arrow = to_arrow_schema(schema)
    return pa.schema(
        [pa.field(f.name, pa.timestamp(f.type.unit) if pa.types.is_timestamp(f.type) else f.type) for f in arrow]
    )


def _record_batch(rows: list, schema: pa.Schema) -> pa.RecordBatch:
    columns = [pa.array([row[i] for row in rows], type=field.type) for i, field in enumerate(schema)]
    return pa.record_batch(columns, schema=schema)
