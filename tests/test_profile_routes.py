"""Exact order statistics by each engine's own percentile aggregate (DuckDB, PostgreSQL) or by brackets
from a quantile summary (Spark) give the profiles of the portable window route, value for value.

Reference: the portable route (the window route, checked against numpy's inverted-CDF quantiles in
test_profile.py) run on the same engine and on SQLite (tests/sqlite_engine.py), and numpy itself.
"""

from __future__ import annotations

import contextlib
import threading

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlglot
from recording import Recording
from test_profile import LAYOUT, assert_profile, invented_design, reference_profile

from featpipe.fitting.beside import beside
from featpipe.fitting.metrics import training_profiles
from featpipe.fitting.order_statistics import PERCENTILE, WINDOW, non_null_counts, values_at_ranks
from featpipe.sqlgen.brackets import merged, read_segments
from featpipe.sqlgen.common import column
from featpipe.sqlgen.profile import needed_ranks, rank_fraction


def load(engine, tmp_path):
    path = tmp_path / "design.parquet"
    data = invented_design()
    pq.write_table(pa.table({name: pa.array(values, from_pandas=True) for name, values in data.items()}), path)
    engine.load_file(LAYOUT.table, path)
    return data


def check_routes_agree(engine, tmp_path):
    data = load(engine, tmp_path)
    columns = {name: column(name) for name in LAYOUT.terms}
    fast = training_profiles(engine, LAYOUT, columns, route=PERCENTILE)
    portable = training_profiles(engine, LAYOUT, columns, route=WINDOW)
    assert fast == portable  # every figure, bit for bit: the same values and the same moments query
    training = ~data["_holdout"]
    assert fast["payment_ratio"].edges == reference_profile(data["payment_ratio"][training]).edges  # numpy inverted_cdf


def test_percentile_route_equals_the_window_route_on_duckdb(tmp_path):
    from featpipe.engines.duckdb import DuckDBEngine

    engine = DuckDBEngine(None)
    check_routes_agree(engine, tmp_path)
    engine.close()


def test_percentile_route_equals_the_window_route_on_postgres(postgres_engine, tmp_path):
    check_routes_agree(postgres_engine, tmp_path)


def test_postgres_profiles_compute_an_expression_once_per_row(postgres_engine, tmp_path):
    """PostgreSQL repeats a repeated expression: the profile queries read it from a fenced subquery."""
    load(postgres_engine, tmp_path)
    predictor = sqlglot.parse_one("payment_ratio + 0.25 * fleet_size", read="postgres")  # like a linear predictor
    columns = {"payment_ratio": column("payment_ratio"), "predictor": predictor}
    recording = Recording(postgres_engine)
    fast = training_profiles(recording, LAYOUT, columns)
    assert fast == training_profiles(postgres_engine, LAYOUT, columns, route=WINDOW)  # the portable route, bit for bit
    assert len(recording.queries) == 3  # counts, percentiles, moments with edge counts
    for query in recording.queries:
        assert query.count('"fleet_size"') == 1


@pytest.mark.spark
def test_spark_profiles_bracket_ranks_with_a_quantile_summary_not_percentile_disc(spark_engine, tmp_path):
    """Spark's PERCENTILE_DISC keeps a hash map of every distinct value per fraction in the JVM's memory: 16
    columns of 1M distinct values ended the session on an out-of-memory error; the window route sorts
    every distinct value (31 of the 97 s of a fit on 1M rows; both measured on this machine). The
    bracketing route gives the window route's profiles, bit for bit, with neither."""
    data = load(spark_engine, tmp_path)
    columns = {name: column(name) for name in LAYOUT.terms}
    recording = Recording(spark_engine)
    profiles = training_profiles(recording, LAYOUT, columns)
    assert not any("PERCENTILE_DISC" in query.upper() or " OVER " in query.upper() for query in recording.queries)
    assert sum("PERCENTILE_APPROX" in query.upper() for query in recording.queries) == 1
    assert profiles == training_profiles(spark_engine, LAYOUT, columns, route=WINDOW)
    training = ~data["_holdout"]
    assert profiles["payment_ratio"].edges == reference_profile(data["payment_ratio"][training]).edges  # numpy inverted_cdf


class MissedSummary(Recording):
    """The engine, except that its quantile summary answers values above every row of the first column,
    so that column's brackets miss (Spark's error bound rules that out; the route must not rest on it)."""

    def fetch(self, query):
        rows = super().fetch(query)
        if "PERCENTILE_APPROX" not in self.queries[-1].upper():
            return rows
        ((first, *others),) = rows
        return [([value + 1000.0 for value in first], *others)]


@pytest.mark.spark
def test_a_missed_bracket_is_ranked_by_the_window_route(spark_engine, tmp_path):
    data = load(spark_engine, tmp_path)
    names = ["payment_ratio", "late_payments", "fleet_size"]
    columns = {name: column(name) for name in names}
    counts = non_null_counts(spark_engine, LAYOUT, columns)
    ranks = {name: needed_ranks(n) for name, n in counts.items()}
    missed = MissedSummary(spark_engine)
    found = values_at_ranks(missed, LAYOUT, columns, counts, ranks)
    assert found == values_at_ranks(spark_engine, LAYOUT, columns, counts, ranks, route=WINDOW)
    (window,) = [query for query in missed.queries if " OVER " in query.upper()]
    assert "'payment_ratio'" in window and "'late_payments'" not in window and "'fleet_size'" not in window
    present = data["payment_ratio"][~data["_holdout"] & ~np.isnan(data["payment_ratio"])]
    assert found["payment_ratio"][ranks["payment_ratio"][0]] == np.sort(present)[ranks["payment_ratio"][0] - 1]  # numpy


def test_segment_counts_give_the_value_at_each_rank_or_a_miss():
    """Rows of segments_query: 10 values below the interval [5, 6] (segment 0), 2 fives and 3 sixes
    inside it (segment 1), 5 values above (segment 2)."""
    rows = [("x", 0, None, 10), ("x", 1, 6.0, 3), ("x", 1, 5.0, 2), ("x", 2, None, 5)]
    assert read_segments({"x": (11, 12, 15)}, rows) == {"x": {11: 5.0, 12: 5.0, 15: 6.0}}
    assert read_segments({"x": (11, 16)}, rows) == {"x": None}  # rank 16 lies above the interval
    assert read_segments({"x": (10,)}, rows) == {"x": None}  # rank 10 lies below it
    assert read_segments({"x": (1,)}, []) == {"x": None}
    assert merged([(1.0, 3.0), (7.0, 8.0), (2.0, 5.0), (5.0, 6.0)]) == ((1.0, 6.0), (7.0, 8.0))


def same_profiles(got, expected, names):
    """Counts, order statistics and shares bit for bit; mean and sd (sums in each engine's order) to 1e-12."""
    for name in names:
        assert_profile(got[name], expected[name])


def test_duckdb_profiles_equal_sqlite_portable_route(tmp_path):
    """DuckDB's route (values sorted in numpy) against the window route on SQLite, a very different engine."""
    from sqlite_engine import SQLiteEngine

    from featpipe.engines.duckdb import DuckDBEngine

    duckdb_engine, sqlite = DuckDBEngine(None), SQLiteEngine(None)
    load(duckdb_engine, tmp_path)
    load(sqlite, tmp_path)
    columns = {name: column(name) for name in LAYOUT.terms}
    same_profiles(training_profiles(duckdb_engine, LAYOUT, columns), training_profiles(sqlite, LAYOUT, columns), LAYOUT.terms)
    duckdb_engine.close()
    sqlite.close()


def test_duckdb_profiles_read_each_column_once_and_sort_it_in_numpy(tmp_path):
    """DuckDB reads one column out about as fast as it counts it, and numpy sorts 2M doubles several
    times faster than quantile_disc selects from them (benchmarks/bench_fit.py): one plain query per
    column, no aggregate, and the profiles of the window route on the same engine."""
    from featpipe.engines.duckdb import DuckDBEngine

    engine = DuckDBEngine(None)
    data = load(engine, tmp_path)
    predictor = sqlglot.parse_one("payment_ratio + 0.25 * fleet_size", read="duckdb")
    columns = {**{name: column(name) for name in LAYOUT.terms}, "predictor": predictor}
    recording = Recording(engine)
    profiles = training_profiles(recording, LAYOUT, columns)
    assert len(recording.queries) == len(columns)
    for query in recording.queries:
        assert not any(word in query.upper() for word in ("QUANTILE", "COUNT(", "SUM(", " OVER ", "UNION")), query
    same_profiles(profiles, training_profiles(engine, LAYOUT, columns, route=WINDOW), columns)
    training = ~data["_holdout"]
    assert_profile(profiles["payment_ratio"], reference_profile(data["payment_ratio"][training]))  # numpy
    engine.close()


class HeldBack(Recording):
    """A recording engine whose second connection (`beside`) runs no query before `released` is set."""

    def __init__(self, engine, release: threading.Event | None = None):
        super().__init__(engine)
        self.held, self.release, self.twins = release is not None, release or threading.Event(), []

    def fetch(self, query):
        self._wait()
        return super().fetch(query)

    def fetch_batches(self, query, batch_rows):
        self._wait()
        return super().fetch_batches(query, batch_rows)

    def _wait(self) -> None:
        if self.held:
            assert self.release.wait(timeout=60), "a held-back query was never let go"

    @contextlib.contextmanager
    def beside(self):
        with self.engine.beside() as twin:
            self.twins.append(HeldBack(twin, self.release))
            yield self.twins[-1]


def profiles_held_back_beside(engine, tmp_path):
    """Profiles started `beside` while the caller runs a count on its own connection, their queries held
    back until it has: which could never happen were they run in turn on the caller's thread. Returns
    the held engine, the profiles and what reading them in turn sent."""
    data = load(engine, tmp_path)
    columns = {name: column(name) for name in LAYOUT.terms}
    held = HeldBack(engine)
    with beside(held) as start:
        profiles = start(training_profiles, LAYOUT, columns)
        assert held.fetch(sqlglot.parse_one(f"SELECT COUNT(*) FROM {LAYOUT.table}")) == [(len(data[LAYOUT.key]),)]
        held.release.set()
        found = profiles()
    in_turn = Recording(engine)
    assert found == training_profiles(in_turn, LAYOUT, columns)  # figure for figure
    (twin,) = held.twins
    assert len(held.queries) == 1 and twin.queries == in_turn.queries  # the caller's count here, the profiles there
    return twin


def test_profiles_started_beside_are_read_on_a_second_connection_while_the_caller_goes_on(postgres_engine, tmp_path):
    """A fit's term profiles do not wait for the fit: on PostgreSQL `beside` reads them on a second
    connection in a thread of their own, closed after."""
    twin = profiles_held_back_beside(postgres_engine, tmp_path)
    assert twin.engine is not postgres_engine and twin.engine.connection is not postgres_engine.connection
    assert twin.engine.connection.closed


@pytest.mark.spark
def test_profiles_started_beside_on_spark_run_from_another_thread_of_the_same_session(spark_engine, tmp_path):
    """A Spark session runs jobs sent from several threads: `beside` sends the profiles' jobs from a thread
    of their own while the caller sends its own."""
    assert profiles_held_back_beside(spark_engine, tmp_path).engine is spark_engine


def test_profiles_started_beside_duckdb_are_read_at_once_on_its_one_connection(tmp_path):
    """DuckDB works in this process, on the cores the fit keeps busy: `beside` does the work at once, as
    the caller would."""
    from featpipe.engines.duckdb import DuckDBEngine

    engine = DuckDBEngine(None)
    load(engine, tmp_path)
    columns = {name: column(name) for name in LAYOUT.terms}
    recording = Recording(engine)
    with beside(recording) as start:
        profiles = start(training_profiles, LAYOUT, columns)
        assert len(recording.queries) == len(columns) and not recording.beside_queries  # read before start returned
    assert profiles() == training_profiles(engine, LAYOUT, columns)
    engine.close()


@pytest.mark.parametrize("n", [1, 2, 3, 7, 10, 11, 99, 1000, 10_000_001])
def test_rank_fraction_selects_the_rank_on_duckdb(n):
    """DuckDB's quantile_disc at (r - 1/2) / n returns the r-th value of 1..n (its inverted CDF), for every
    rank the profile needs."""
    import duckdb

    connection = duckdb.connect()
    ranks = needed_ranks(n)
    fractions = ", ".join(repr(rank_fraction(rank, n)) for rank in ranks)
    (got,) = connection.execute(f"SELECT quantile_disc(i, [{fractions}]) FROM range(1, {n + 1}) t(i)").fetchone()
    assert got == list(ranks)
    assert np.array_equal(got, np.quantile(np.arange(1, n + 1), [rank_fraction(r, n) for r in ranks], method="inverted_cdf"))
