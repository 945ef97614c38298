"""Real engines for tests: a throwaway PostgreSQL server and one local Spark session per test run.

Load with `pytest_plugins = ["fixtures_engines"]` in tests/conftest.py (or `-p fixtures_engines` with
tests/ on the path). Fixtures:

- `postgres_dsn` (session): DSN of a private PostgreSQL server on 127.0.0.1 (password authentication,
  so a wrong password is refused); started once, stopped at the end of the run, at exit, and by a
  watchdog process when the run is killed.
- `postgres_engine`: a PostgresEngine on that server whose tables go to a fresh schema, dropped after
  the test (its `dsn` carries the search_path, for clients such as psql).
- `spark_session` (session): the one local SparkSession of the run, started by SparkEngine itself
  (warehouse and metastore in a temporary build folder).
- `spark_engine`: a SparkEngine on that session, in a fresh Spark database dropped after the test.

When an engine's software is absent its tests are skipped on a developer's machine, but they FAIL
when CI=true, so CI can never pass by skipping (see `require_engine`). Tests that need Spark carry the
`spark` marker (`-m spark` selects them, `-m "not spark"` leaves them out).
"""

from __future__ import annotations

import atexit
import glob
import itertools
import os
import pwd
import re
import secrets
import shutil
import socket
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import NoReturn

import pytest
from sqlglot import exp

from featpipe.project import EngineConfig

_fresh_numbers = itertools.count(1)

# Run by a separate Python: wait until the test process is gone (its end of the pipe closes), then stop
# the server and remove its folder. argv: folder, then the pg_ctl stop command.
_WATCHDOG = """
import os, shutil, subprocess, sys
sys.stdin.read()
if os.path.isdir(sys.argv[1]):
    subprocess.run(sys.argv[2:], capture_output=True)
    shutil.rmtree(sys.argv[1], ignore_errors=True)
"""


def pytest_configure(config):
    config.addinivalue_line("markers", "spark: needs the local Spark session (select with -m spark)")


def in_ci() -> bool:
    return os.environ.get("CI", "").strip().lower() in ("true", "1", "yes")


def require_engine(name: str, reason: str) -> NoReturn:
    """Stop the current test because engine `name` cannot run here: skip it, or fail it under CI=true."""
    message = f"{name} is not available: {reason}"
    if in_ci():
        pytest.fail(f"{message} (CI=true, so engine tests may not be skipped)", pytrace=False)
    pytest.skip(message)


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def postgres_programs() -> tuple[str, str] | None:
    """initdb and pg_ctl from PATH, else from the newest /usr/lib/postgresql/N/bin."""
    initdb, pg_ctl = shutil.which("initdb"), shutil.which("pg_ctl")
    if initdb and pg_ctl:
        return initdb, pg_ctl
    folders = sorted(
        glob.glob("/usr/lib/postgresql/*/bin"),
        key=lambda folder: [int(part) for part in re.findall(r"\d+", folder)],
    )
    for folder in reversed(folders):
        initdb, pg_ctl = Path(folder, "initdb"), Path(folder, "pg_ctl")
        if initdb.is_file() and pg_ctl.is_file():
            return str(initdb), str(pg_ctl)
    return None


class PostgresServer:
    """A private cluster in a temporary folder: initdb with a random superuser password, pg_ctl start/stop.

    As root the folder is handed to the `postgres` account and the programs run through runuser,
    because PostgreSQL refuses to run as root.
    """

    def __init__(self, initdb: str, pg_ctl: str):
        self.initdb, self.pg_ctl = initdb, pg_ctl
        self.as_owner: list[str] = []
        owner = None
        if os.geteuid() == 0:
            try:
                owner = pwd.getpwnam("postgres")
            except KeyError:
                require_engine("postgres", "running as root needs a 'postgres' account to own the server")
            self.as_owner = ["runuser", "-u", "postgres", "--"]
        self.folder = Path(tempfile.mkdtemp(prefix="featpipe-pg-"))
        if owner is not None:
            os.chown(self.folder, owner.pw_uid, owner.pw_gid)
        self.data = self.folder / "data"
        self.log = self.folder / "server.log"
        self.password = secrets.token_hex(12)
        self.port: int | None = None
        self.running = False

    def start(self) -> str:
        """initdb, then start on a free port; returns the DSN (host, port, user, password, dbname)."""
        password_file = self.folder / "password"
        password_file.write_text(self.password + "\n")
        self._run(
            self.initdb, "-D", str(self.data), "-U", "postgres", "-A", "scram-sha-256",
            "--pwfile", str(password_file), "-E", "UTF8", "--locale=C", "--no-sync",
        )  # fmt: skip
        password_file.unlink()
        for _attempt in range(3):  # another process may take the free port before the server binds it
            self.port = free_port()
            options = (
                f"-p {self.port} -k {self.folder} -c listen_addresses=127.0.0.1 "
                "-c fsync=off -c full_page_writes=off -c synchronous_commit=off"
            )
            started = self._run(
                self.pg_ctl, "-D", str(self.data), "-l", str(self.log), "-w", "-t", "60", "-o", options, "start",
                check=False,
            )  # fmt: skip
            if started.returncode == 0:
                self.running = True
                self._watch()
                return self.dsn
        raise RuntimeError(f"pg_ctl could not start PostgreSQL; server log:\n{self._log_tail()}")

    @property
    def dsn(self) -> str:
        return f"host=127.0.0.1 port={self.port} user=postgres password={self.password} dbname=postgres"

    def stop(self) -> None:
        """Fast shutdown and remove the folder; safe to call twice (finalizer and atexit)."""
        if self.running:
            self._run(self.pg_ctl, "-D", str(self.data), "-m", "fast", "-w", "stop", check=False)
            self.running = False
            self.watchdog.stdin.close()  # nothing left to stop; the watchdog finds the folder gone
            self.watchdog.wait()
        shutil.rmtree(self.folder, ignore_errors=True)

    def _watch(self) -> None:
        """A watchdog that stops the server when this process ends in a way atexit never sees (SIGTERM,
        SIGKILL): it waits for EOF on a pipe only this process holds open."""
        stop = [*self.as_owner, self.pg_ctl, "-D", str(self.data), "-m", "fast", "-w", "stop"]
        self.watchdog = subprocess.Popen(
            [sys.executable, "-c", _WATCHDOG, str(self.folder), *stop],
            stdin=subprocess.PIPE, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True,
        )  # fmt: skip

    def _run(self, *command: str, check: bool = True) -> subprocess.CompletedProcess:
        done = subprocess.run([*self.as_owner, *command], capture_output=True, text=True, cwd=self.folder)
        if check and done.returncode != 0:
            raise RuntimeError(f"{Path(command[0]).name} failed ({done.returncode}):\n{done.stdout}{done.stderr}")
        return done

    def _log_tail(self) -> str:
        return "\n".join(self.log.read_text(errors="replace").splitlines()[-20:]) if self.log.exists() else ""


@pytest.fixture(scope="session")
def postgres_dsn():
    try:
        import psycopg  # noqa: F401
    except ImportError:
        require_engine("postgres", "the psycopg package is not installed (pip install -e '.[test]')")
    programs = postgres_programs()
    if programs is None:
        require_engine("postgres", "initdb/pg_ctl not found on PATH or in /usr/lib/postgresql/*/bin")
    server = PostgresServer(*programs)
    atexit.register(server.stop)  # also stops it when the run dies before the finalizer
    try:
        dsn = server.start()
    except RuntimeError as error:
        server.stop()
        pytest.fail(f"PostgreSQL is installed but did not start: {error}", pytrace=False)
    yield dsn
    server.stop()


@pytest.fixture
def postgres_engine(postgres_dsn):
    """A PostgresEngine whose tables land in a schema of its own (first on its search_path), dropped after
    the test, so tests never see each other's tables. A schema costs milliseconds; a database 0.4 s."""
    import psycopg
    from psycopg.conninfo import make_conninfo

    from featpipe.engines.postgres import PostgresEngine

    name = f"featpipe_test_{next(_fresh_numbers)}"
    schema = psycopg.sql.Identifier(name)
    with psycopg.connect(postgres_dsn, autocommit=True) as admin:
        admin.execute(psycopg.sql.SQL("CREATE SCHEMA {}").format(schema))
    dsn = make_conninfo(postgres_dsn, options=f"-c search_path={name}")
    engine = PostgresEngine(EngineConfig(kind="postgres", dsn=dsn))
    yield engine
    engine.close()
    with psycopg.connect(postgres_dsn, autocommit=True) as admin:
        admin.execute(psycopg.sql.SQL("DROP SCHEMA {} CASCADE").format(schema))


@pytest.fixture(scope="session")
def spark_session(tmp_path_factory):
    try:
        import pyspark  # noqa: F401
    except ImportError:
        require_engine("spark", "the pyspark package is not installed (pip install -e '.[test]')")
    java_home = os.environ.get("JAVA_HOME")
    if not shutil.which("java") and not (java_home and Path(java_home, "bin", "java").is_file()):
        require_engine("spark", "no Java runtime (java on PATH or JAVA_HOME); Spark 4 needs Java 17 or newer")
    from featpipe.engines.spark import SparkEngine
    from featpipe.errors import EngineError

    build = tmp_path_factory.mktemp("spark") / "build"
    try:
        starter = SparkEngine(EngineConfig(kind="spark", path=build / "spark", master="local[2]"))
    except EngineError as error:
        pytest.fail(f"Spark is installed but did not start: {error}", pytrace=False)
    yield starter.session
    starter.close()


@pytest.fixture
def spark_engine(spark_session):
    """A SparkEngine on the run's session, in a Spark database of its own dropped after the test."""
    from featpipe.engines.spark import SparkEngine

    database = f"featpipe_test_{next(_fresh_numbers)}"
    engine = SparkEngine(EngineConfig(kind="spark", database=database))
    yield engine
    spark_session.catalog.setCurrentDatabase("default")
    engine.execute(exp.Drop(tables=[exp.Table(db=exp.to_identifier(database))], kind="SCHEMA", exists=True, cascade=True))
    engine.close()
