"""Work the commands no longer do: no hash per row when nothing is held out, no separate profile scan
when a fit sums its statistics in SQL (PostgreSQL, Spark, `source="sql"`), no scipy.stats import to fit.

References: the rows a hash split holds out are recomputed with Python's hashlib (MD5, RFC 1321); the
coefficients come from statsmodels' GLM on the same rows; the profile is compared with the one the
separate profile query returns on the same engine (DuckDB, PostgreSQL, Spark), exactly; p-values and
intervals with scipy.stats' distributions, exactly. The reads of the design table are counted by
wrapping the engine, not taken from featpipe's own counter.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import statsmodels.api as sm
from conftest import REPO, copy_demo, write_project
from sqlglot import exp

from featpipe import api
from featpipe.compiler.layout import DesignLayout
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.glm import Glm
from featpipe.glm.families import get_family
from featpipe.glm.sources import LocalCopy, Request, Scaling, SqlAggregateSource, engine_batches, numpy_values
from featpipe.sqlgen.common import render
from featpipe.sqlgen.design import design_query
from featpipe.sqlgen.statistics import profile_query, read_profile

SPEC = """\
input: orders
target: returned
family: binomial
terms: [item_price, northern, items]
holdout: {fraction: FRACTION}
"""
LAYOUT = DesignLayout("design_m", "id", "y", ("a", "b", "c"))
ROWS = 3_000


class CountingEngine:
    """An engine whose queries that read the design table are counted: each is one full read of its rows."""

    def __init__(self, engine, table: str):
        self.engine, self.table, self.reads = engine, table, 0

    def __getattr__(self, name):
        return getattr(self.engine, name)

    def _count(self, query: exp.Expression) -> None:
        self.reads += any(table.name == self.table for table in query.find_all(exp.Table))

    def fetch(self, query):
        self._count(query)
        return self.engine.fetch(query)

    def fetch_frame(self, query):
        self._count(query)
        return self.engine.fetch_frame(query)

    def fetch_table(self, query):
        self._count(query)
        return self.engine.fetch_table(query)

    def fetch_batches(self, query, batch_rows):
        self._count(query)
        return self.engine.fetch_batches(query, batch_rows)


def design_rows(family: str, seed: int = 4) -> tuple[pd.DataFrame, np.ndarray, np.ndarray]:
    """Invented rows laid out like a design table: three terms on different scales, all trained on."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(ROWS, 3)) * [1.0, 4.0, 0.3] + [0.5, -2.0, 1.0]
    eta = -0.3 + x @ [0.6, -0.1, 1.2]
    y = (rng.uniform(size=ROWS) < 1 / (1 + np.exp(-eta))).astype(float) if family == "binomial" else rng.poisson(np.exp(eta * 0.5)).astype(float)
    frame = pd.DataFrame({"id": np.arange(ROWS), "y": y, "_holdout": False, "a": x[:, 0], "b": x[:, 1], "c": x[:, 2]})
    return frame, x, y


def load(engine, frame: pd.DataFrame, tmp_path):
    path = tmp_path / "design.parquet"
    frame.to_parquet(path, index=False)
    engine.load_file(LAYOUT.table, path)
    return engine


def test_a_design_with_nothing_held_out_computes_no_hash_per_row(tmp_path):
    none_held = api.load_project(write_project(tmp_path / "none", {"specs/returns.yaml": SPEC.replace("FRACTION", "0.0")}))
    some_held = api.load_project(write_project(tmp_path / "some", {"specs/returns.yaml": SPEC.replace("FRACTION", "0.5")}))
    sql = {
        name: render(design_query(api.check(project).models["returns"], project.inputs["orders"]), "duckdb", pretty=False)
        for name, project in (("none", none_held), ("some", some_held))
    }
    assert "MD5" not in sql["none"].upper()
    assert "MD5" in sql["some"].upper()
    held = {}
    for name, project, share in (("none", none_held, 0.0), ("some", some_held, 0.5)):
        api.compute(project)
        engine = DuckDBEngine(project.root / "build" / "shop.duckdb", read_only=True)
        held[name] = dict(engine.fetch(exp.select("order_id", "_holdout").from_("design_returns")))
        engine.close()
        # hashlib: a row is held out when the first 8 hex digits of MD5('v1:' key) fall below share * 16**8
        expected = {key: int(hashlib.md5(f"v1:{key}".encode()).hexdigest()[:8], 16) < round(share * 16**8) for key in range(1, 9)}
        assert held[name] == expected
    assert held["none"] == dict.fromkeys(range(1, 9), False)  # every order is trained on
    assert any(held["some"].values())


@pytest.mark.parametrize("family", ["binomial", "poisson"])
def test_an_aggregate_fit_gathers_the_profile_in_its_first_pass(family, tmp_path):
    frame, x, y = design_rows(family)
    engine = CountingEngine(load(DuckDBEngine(tmp_path / "design.duckdb"), frame, tmp_path), LAYOUT.table)
    fit = Glm(family, source="sql", sample_rows=ROWS // 4).fit(engine, LAYOUT)
    # One query for the sample (DuckDB's first rows, a LIMIT that stops early: not a full read), then one
    # full read per IRLS pass (the first also sums the profile) and for poisson one for the weight per
    # target value (its log-likelihood constant).
    constant_reads = 1 if family == "poisson" else 0
    assert engine.reads - 1 == fit.convergence.passes_over_data == fit.convergence.iterations + constant_reads
    reference = sm.GLM(y, sm.add_constant(x), family=getattr(sm.families, family.capitalize())()).fit(tol=1e-12)  # statsmodels IRLS
    np.testing.assert_allclose(fit.estimates, reference.params, rtol=1e-8)
    assert fit.goodness_of_fit.log_likelihood == pytest.approx(reference.llf, rel=1e-10)


def test_an_aggregate_pass_too_wide_for_the_engine_is_read_in_parts(monkeypatch, tmp_path):
    """Spark compiles at most some 500 sums of a query well (featpipe.glm.sources.AGGREGATES_PER_QUERY): a
    wider pass is read as several queries over the same rows, each a read counted among the passes. Here
    DuckDB is given a limit of 5 aggregates, so every pass of a 3-term model is read in parts."""
    import featpipe.glm.sources as sources

    frame, x, y = design_rows("binomial")
    engine = CountingEngine(load(DuckDBEngine(tmp_path / "design.duckdb"), frame, tmp_path), LAYOUT.table)
    widths = []
    counted_fetch = engine.fetch

    def fetch(query):  # the aggregates of each query, then the counted read
        widths.append(len(query.expressions))
        return counted_fetch(query)

    engine.fetch = fetch
    monkeypatch.setitem(sources.AGGREGATES_PER_QUERY, "duckdb", 5)
    fit = Glm("binomial", source="sql", sample_rows=ROWS // 4).fit(engine, LAYOUT)
    assert max(widths) == 5 and fit.convergence.passes_over_data == engine.reads - 1  # less the sample's LIMIT
    assert fit.convergence.passes_over_data > 2 * fit.convergence.iterations
    reference = sm.GLM(y, sm.add_constant(x), family=sm.families.Binomial()).fit(tol=1e-12)  # statsmodels IRLS
    np.testing.assert_allclose(fit.estimates, reference.params, rtol=1e-8)


def test_postgresql_fit_reads_the_design_table_twice_whatever_the_passes(postgres_engine, tmp_path):
    frame, x, y = design_rows("binomial", seed=8)
    engine = CountingEngine(load(postgres_engine, frame, tmp_path), LAYOUT.table)
    fit = Glm("binomial", sample_rows=ROWS // 4).fit(engine, LAYOUT)
    assert fit.convergence.source == "local"
    # The sample (ORDER BY key LIMIT) reads every row once, the local copy once more; the IRLS passes
    # (still counted in passes_over_data) read the copy.
    assert engine.reads == 2
    assert fit.convergence.passes_over_data == 1 + fit.convergence.iterations >= 3
    reference = sm.GLM(y, sm.add_constant(x), family=sm.families.Binomial()).fit(tol=1e-12)  # statsmodels IRLS
    np.testing.assert_allclose(fit.estimates, reference.params, rtol=1e-8)


@pytest.mark.parametrize("engine_name", ["duckdb", "postgres"])
def test_a_table_no_larger_than_the_sample_is_read_once_and_fitted_in_memory(engine_name, request, tmp_path):
    frame, x, y = design_rows("binomial", seed=6)
    engine = DuckDBEngine(tmp_path / "design.duckdb") if engine_name == "duckdb" else request.getfixturevalue("postgres_engine")
    engine = CountingEngine(load(engine, frame, tmp_path), LAYOUT.table)
    fit = Glm("binomial").fit(engine, LAYOUT)  # 3,000 rows, fewer than the sample takes (100,000): it holds every row
    assert fit.convergence.source == "memory"
    assert engine.reads == 1  # the sample; every IRLS pass (still counted in passes_over_data) runs on it in memory
    assert fit.convergence.passes_over_data == 1 + fit.convergence.iterations
    reference = sm.GLM(y, sm.add_constant(x), family=sm.families.Binomial()).fit(tol=1e-12)  # statsmodels IRLS
    np.testing.assert_allclose(fit.estimates, reference.params, rtol=1e-8)
    np.testing.assert_allclose(np.sqrt(np.diag(fit.covariance)), reference.bse, rtol=1e-7)


@pytest.mark.parametrize("engine_name", ["duckdb", "postgres", pytest.param("spark", marks=pytest.mark.spark)])
def test_the_profile_from_the_first_pass_equals_the_profile_query(engine_name, request, tmp_path):
    frame, x, _ = design_rows("poisson", seed=9)
    engine = DuckDBEngine(tmp_path / "design.duckdb") if engine_name == "duckdb" else request.getfixturevalue(f"{engine_name}_engine")
    load(engine, frame, tmp_path)
    scaling = Scaling(x[:100].mean(axis=0), x[:100].std(axis=0))
    source = SqlAggregateSource(engine, LAYOUT, get_family("poisson"), scaling)
    requests = [Request((0, 1, 2), np.array([0.1, 0.2, -0.3, 0.4])), Request((), np.array([0.2]))]
    statistics, profile, _ = source.evaluate_with_profile(requests, LAYOUT.terms)
    shifts = dict(zip(LAYOUT.terms, scaling.centers.tolist(), strict=True))
    # The same engine's separate profile query and statistics query, compared exactly (same sums, same rows).
    assert profile == read_profile(engine.fetch(profile_query(LAYOUT, shifts))[0], LAYOUT, shifts)
    alone = SqlAggregateSource(engine, LAYOUT, get_family("poisson"), scaling).evaluate(requests)
    for mine, theirs in zip(statistics, alone, strict=True):
        assert (mine.deviance, mine.boundary_rows, mine.pearson) == (theirs.deviance, theirs.boundary_rows, theirs.pearson)
        np.testing.assert_array_equal(mine.score, theirs.score)
        np.testing.assert_array_equal(mine.xtwx, theirs.xtwx)
    assert profile.rows == ROWS


def after_a_fit(tmp_path, expression: str) -> str:
    """What `expression` (over sys.modules) prints after a fit of the lease demo in a fresh process."""
    project = copy_demo("lease_default", tmp_path)
    script = f"import sys; from featpipe import api; api.fit(api.load_project(sys.argv[1]), ['default_risk']); print({expression})"
    environment = {**os.environ, "PYTHONPATH": str(REPO)}
    loaded = subprocess.run([sys.executable, "-c", script, str(project)], capture_output=True, text=True, env=environment, check=True)
    return loaded.stdout.strip()


def test_a_fit_does_not_import_scipy_stats_and_its_figures_are_scipy_stats_own(tmp_path):
    assert after_a_fit(tmp_path, "sorted(name for name in sys.modules if name.startswith('scipy.stats'))") == "[]"
    from scipy import stats

    from featpipe.glm.inference import wald

    coef, covariance = np.array([0.3, -1.2, 4.0]), np.array([[0.04, 0.01, 0.0], [0.01, 0.09, 0.02], [0.0, 0.02, 0.25]])
    stderr = np.sqrt(np.diag(covariance))
    z_test = wald(coef, covariance, get_family("binomial"), df_residual=17)  # z: the normal distribution
    np.testing.assert_array_equal(z_test.p_value, 2.0 * stats.norm.sf(np.abs(coef / stderr)))
    np.testing.assert_array_equal(z_test.ci_high, coef + stats.norm.ppf(0.975) * stderr)
    t_test = wald(coef, covariance, get_family("gaussian"), df_residual=17)  # t with 17 df
    np.testing.assert_array_equal(t_test.p_value, 2.0 * stats.t.sf(np.abs(coef / stderr), 17))
    np.testing.assert_array_equal(t_test.ci_low, coef - stats.t.ppf(0.975, 17) * stderr)


def test_a_fit_on_duckdb_does_not_import_pandas(tmp_path):
    """pyarrow's to_numpy imports pandas (0.3 s); a fit reads Arrow columns through `numpy_values` instead."""
    assert after_a_fit(tmp_path, "'pandas' in sys.modules") == "False"


def test_numpy_values_read_numbers_from_arrow_buffers_and_leave_the_rest_to_pyarrow():
    sliced = pa.array([1.0, 2.0, 3.0, 4.0]).slice(1, 2)
    np.testing.assert_array_equal(numpy_values(sliced), [2.0, 3.0])  # the slice's offset, not the buffer's start
    np.testing.assert_array_equal(numpy_values(pa.chunked_array([[1.0, 2.0], [3.0]])), [1.0, 2.0, 3.0])
    assert numpy_values(pa.array([1, 2], pa.int32())).dtype == np.int32
    np.testing.assert_array_equal(numpy_values(pa.array([1.0, None])), [1.0, np.nan])  # NULLs as pyarrow gives them
    np.testing.assert_array_equal(numpy_values(pa.array([True, False])), [True, False])


def test_a_local_copy_reads_the_engine_once_and_fits_as_the_stream_does(tmp_path):
    frame, x, y = design_rows("poisson")
    engine = CountingEngine(load(DuckDBEngine(tmp_path / "design.duckdb"), frame, tmp_path), LAYOUT.table)
    local = Glm("poisson", source="local", sample_rows=ROWS // 4, batch_rows=500).fit(engine, LAYOUT)
    assert engine.reads == 2  # the sample's LIMIT and the copy; every IRLS pass reads the copy
    streamed = Glm("poisson", source="stream", sample_rows=ROWS // 4, batch_rows=500).fit(engine.engine, LAYOUT)
    assert (local.convergence.source, streamed.convergence.source) == ("local", "stream")
    assert local.convergence.passes_over_data == streamed.convergence.passes_over_data >= 3
    # The same batches in the same order: the same sums.
    np.testing.assert_allclose(local.estimates, streamed.estimates, rtol=1e-13)
    reference = sm.GLM(y, sm.add_constant(x), family=sm.families.Poisson()).fit(tol=1e-12)  # statsmodels IRLS
    np.testing.assert_allclose(local.estimates, reference.params, rtol=1e-8)


def test_an_unfinished_local_copy_is_read_again_from_the_engine(tmp_path):
    frame, _, y = design_rows("binomial")
    engine = load(DuckDBEngine(tmp_path / "design.duckdb"), frame, tmp_path)
    copy = LocalCopy(engine_batches(engine, LAYOUT, 1_000))
    started = copy()
    next(started)
    started.close()  # a pass that stopped after one batch keeps nothing
    passes = [np.concatenate([batch.y for batch in copy()]) for _ in range(2)]
    assert copy.reads == 2
    for read in passes:
        np.testing.assert_array_equal(read, y)  # DuckDB returns the loaded rows in order
    copy.close()
