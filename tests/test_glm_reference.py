"""GLM fits on design tables checked against statsmodels and published values.

Sources: statsmodels' GLM (the reference library), NIST StRD certified values for Longley, the Poisson
example of Dobson (1990) as R's `glm` prints it, and the Spector and Mazzeo logit as econometrics texts
print it. Random designs run on real engines: DuckDB (both statistics sources), SQLite and PostgreSQL.
"""

from __future__ import annotations

import math
import sqlite3

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import statsmodels.api as sm
from statsmodels.stats.outliers_influence import variance_inflation_factor
from threadpoolctl import threadpool_info, threadpool_limits

from featpipe.compiler.layout import DesignLayout
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.glm import Glm
from featpipe.glm.families import get_family
from featpipe.glm.sources import (
    BLOCK_ROWS,
    Batch,
    BatchSource,
    Request,
    Scaling,
    SqlAggregateSource,
    in_memory_batches,
)

FAMILIES = {"binomial": sm.families.Binomial, "poisson": sm.families.Poisson, "gaussian": sm.families.Gaussian}


def design_frame(terms: dict[str, np.ndarray], y, offset=None, weight=None, held_out: int = 0) -> pd.DataFrame:
    """A frame laid out like a design table; `held_out` extra rows of noise are flagged `_holdout`."""
    frame = pd.DataFrame({"id": np.arange(len(y)), "y": np.asarray(y, dtype=float), **terms})
    if offset is not None:
        frame["_offset"] = offset
    if weight is not None:
        frame["_weight"] = weight
    frame["_holdout"] = False
    if held_out:
        noise = frame.sample(held_out, random_state=7).reset_index(drop=True)
        noise["id"] = np.arange(len(y), len(y) + held_out)
        noise[list(terms)] = noise[list(terms)] * 1000.0  # would change every estimate if it were used
        noise["_holdout"] = True
        frame = pd.concat([frame, noise], ignore_index=True)
    return frame


def layout_of(frame: pd.DataFrame, table: str = "design_m") -> DesignLayout:
    terms = tuple(c for c in frame.columns if c not in ("id", "y", "_offset", "_weight", "_holdout"))
    return DesignLayout(
        table, "id", "y", terms,
        offset="_offset" if "_offset" in frame else None,
        weight="_weight" if "_weight" in frame else None,
    )


def duckdb_design(frame: pd.DataFrame, tmp_path, table: str = "design_m") -> tuple[DuckDBEngine, DesignLayout]:
    """An in-memory DuckDB holding `frame` as a design table (loaded from Parquet, so doubles stay exact)."""
    path = tmp_path / f"{table}.parquet"
    frame.to_parquet(path, index=False)
    engine = DuckDBEngine()
    engine.load_file(table, path)
    return engine, layout_of(frame, table)


class SQLiteDesign:
    """Just enough of the engine interface over Python's sqlite3 to run the SQL statistics source.

    Builds without SQLite's math functions (before 3.35, or compiled without them) get Python LN, EXP
    and FLOOR with SQLite's conventions (NULL outside the domain); this build's own are used otherwise.
    """

    name = "sqlite"
    dialect = "sqlite"

    def __init__(self, frame: pd.DataFrame, table: str = "design_m"):
        self.connection = sqlite3.connect(":memory:")
        present = {row[0] for row in self.connection.execute("SELECT name FROM pragma_function_list")}
        fallbacks = {"ln": lambda x: math.log(x) if x is not None and x > 0 else None,
                     "exp": lambda x: None if x is None else math.exp(x) if x < 709 else math.inf,
                     "floor": lambda x: None if x is None else float(math.floor(x))}
        for name, function in fallbacks.items():
            if name not in present:
                self.connection.create_function(name, 1, function, deterministic=True)
        frame.to_sql(table, self.connection, index=False)

    def render(self, statement) -> str:
        return statement.sql(dialect=self.dialect, identify=True)

    def fetch(self, query) -> list[tuple]:
        return self.connection.execute(self.render(query)).fetchall()

    def fetch_frame(self, query) -> pd.DataFrame:
        return pd.read_sql_query(self.render(query), self.connection)

    def fetch_table(self, query) -> pa.Table:
        return pa.Table.from_pandas(self.fetch_frame(query), preserve_index=False)


def random_case(family: str, seed: int = 11, rows: int = 600):
    """Correlated terms on very different scales, an offset and prior weights."""
    rng = np.random.default_rng(seed)
    base = rng.normal(size=(rows, 3))
    terms = {
        "ratio": 0.8 * base[:, 0] + 0.6 * base[:, 1],
        "amount": 1000.0 + 250.0 * base[:, 1],
        "flag": (base[:, 2] > 0.3).astype(float),
    }
    x = np.column_stack(list(terms.values()))
    offset = np.log(rng.uniform(0.5, 2.0, size=rows))
    weight = rng.uniform(0.5, 3.0, size=rows)
    eta = -0.4 + x @ np.array([0.7, 0.002, -0.5]) - 2.0 + offset
    if family == "binomial":
        y = (rng.uniform(size=rows) < 1 / (1 + np.exp(-eta))).astype(float)
    elif family == "poisson":
        y = rng.poisson(np.exp(eta + 1.5)).astype(float)
    else:
        y = eta + rng.normal(scale=0.8, size=rows)
    return terms, x, y, offset, weight


def statsmodels_fit(family: str, x, y, offset=None, weight=None):
    exog = sm.add_constant(x)
    model = sm.GLM(y, exog, family=FAMILIES[family](), offset=offset, var_weights=weight)
    return model.fit(tol=1e-13, use_t=family == "gaussian")


def inference_of(fit, figure: str) -> list[float]:
    """One Wald figure (std_error, statistic, p_value, ci_low, ci_high) of every coefficient, intercept first."""
    return [getattr(coefficient.inference, figure) for coefficient in fit.coefficients]


def assert_matches(fit, reference, rtol=1e-6):
    # Reference: statsmodels GLM results on the same training rows.
    np.testing.assert_allclose(fit.estimates, reference.params, rtol=rtol, atol=1e-12)
    np.testing.assert_allclose(inference_of(fit, "std_error"), reference.bse, rtol=rtol)
    np.testing.assert_allclose(inference_of(fit, "statistic"), reference.tvalues, rtol=rtol, atol=1e-10)
    np.testing.assert_allclose(inference_of(fit, "p_value"), reference.pvalues, rtol=1e-5, atol=1e-12)
    intervals = reference.conf_int()
    np.testing.assert_allclose(inference_of(fit, "ci_low"), intervals[:, 0], rtol=rtol)
    np.testing.assert_allclose(inference_of(fit, "ci_high"), intervals[:, 1], rtol=rtol)
    figures = fit.goodness_of_fit
    assert figures.deviance == pytest.approx(reference.deviance, rel=rtol)
    assert figures.null_deviance == pytest.approx(reference.null_deviance, rel=rtol)
    assert figures.log_likelihood == pytest.approx(reference.llf, rel=rtol)
    assert figures.aic == pytest.approx(reference.aic, rel=rtol)
    assert figures.bic == pytest.approx(reference.bic_llf, rel=rtol)
    assert figures.dispersion == pytest.approx(reference.scale, rel=rtol)
    assert fit.rows.n == reference.nobs
    assert fit.convergence.converged


@pytest.mark.parametrize("family", ["binomial", "poisson", "gaussian"])
def test_offset_and_weights_match_statsmodels_on_both_sources(family, tmp_path):
    terms, x, y, offset, weight = random_case(family)
    reference = statsmodels_fit(family, x, y, offset, weight)
    engine, layout = duckdb_design(design_frame(terms, y, offset, weight, held_out=40), tmp_path)
    streamed = Glm(family, source="stream").fit(engine, layout)  # DuckDB: batches streamed through numpy
    aggregated = Glm(family, source="sql").fit(engine, layout)  # one aggregate query per step
    assert (streamed.convergence.source, aggregated.convergence.source) == ("stream", "sql")
    for fit in (streamed, aggregated):
        assert fit.names == ("(intercept)", "ratio", "amount", "flag")
        assert fit.statistic_name == ("t" if family == "gaussian" else "z")
        assert_matches(fit, reference)
    # The two sources compute the same sums in a different order: same answer to rounding.
    np.testing.assert_allclose(streamed.estimates, aggregated.estimates, rtol=1e-9)
    np.testing.assert_allclose(inference_of(streamed, "std_error"), inference_of(aggregated, "std_error"), rtol=1e-9)


@pytest.mark.parametrize("family", ["binomial", "poisson", "gaussian"])
def test_sqlite_runs_the_same_statistics_query(family):
    terms, x, y, offset, weight = random_case(family, seed=5, rows=300)
    frame = design_frame(terms, y, offset, weight, held_out=20)
    fit = Glm(family, source="sql").fit(SQLiteDesign(frame), layout_of(frame))
    assert_matches(fit, statsmodels_fit(family, x, y, offset, weight))


@pytest.mark.parametrize("family", ["binomial", "poisson", "gaussian"])
@pytest.mark.parametrize("source", ["sql", "auto"])
def test_postgresql_fits_by_its_statistics_query_and_on_a_local_copy(family, source, postgres_engine, tmp_path):
    terms, x, y, offset, weight = random_case(family, seed=6, rows=300)
    frame = design_frame(terms, y, offset, weight, held_out=20)
    path = tmp_path / "design.parquet"
    frame.to_parquet(path, index=False)
    postgres_engine.load_file("design_m", path)
    # auto: the design columns copied once (several batches, a warm start from the sample), IRLS on the copy
    fit = Glm(family, source=source, sample_rows=100, batch_rows=64).fit(postgres_engine, layout_of(frame))
    assert fit.convergence.source == {"sql": "sql", "auto": "local"}[source]
    assert_matches(fit, statsmodels_fit(family, x, y, offset, weight))


def test_sql_and_numpy_statistics_agree_row_for_row(tmp_path):
    """The same sums from the SQL query (DuckDB, SQLite) and from numpy, at coefficients far from the fit."""
    terms, x, y, offset, weight = random_case("binomial", seed=12, rows=200)
    frame = design_frame(terms, y, offset, weight)
    engine, layout = duckdb_design(frame, tmp_path)
    scaling = Scaling(x.mean(axis=0), x.std(axis=0))
    requests = [Request((0, 1, 2), np.array([0.5, 30.0, -2.0, 1.0])), Request((), np.array([-0.3]))]
    for family in ("binomial", "poisson", "gaussian"):
        glm_family = get_family(family)
        data = in_memory_batches(Batch(y, offset, weight, list(x.T)), 64)
        expected = BatchSource("arrays", data, glm_family, scaling).evaluate(requests)
        for sql_engine in (engine, SQLiteDesign(frame)):
            got = SqlAggregateSource(sql_engine, layout, glm_family, scaling).evaluate(requests)
            for want, have in zip(expected, got, strict=True):
                assert have.deviance == pytest.approx(want.deviance, rel=1e-12)
                assert have.boundary_rows == want.boundary_rows
                np.testing.assert_allclose(have.score, want.score, rtol=1e-11, atol=1e-9)
                np.testing.assert_allclose(have.xtwx, want.xtwx, rtol=1e-11, atol=1e-9)
        if family == "binomial":  # eta = 30 x_ratio / sd puts rows past the 1e-10 boundary
            assert 0 < expected[0].boundary_rows < len(y)


def test_a_pass_over_batches_runs_blas_on_one_thread_and_gives_the_threads_back():
    """The batch products are bound by memory; a second BLAS thread would take the core the engine reads on."""
    terms, x, y, offset, weight = random_case("poisson", seed=12, rows=200)
    rows = in_memory_batches(Batch(y, offset, weight, list(x.T)), 64)
    seen = []

    def blas_threads() -> set[int]:  # as threadpoolctl reads them from the BLAS libraries numpy and scipy loaded
        return {info["num_threads"] for info in threadpool_info() if info["user_api"] == "blas"}

    def watched_batches():
        for batch in rows():
            seen.append(blas_threads())
            yield batch

    requests = [Request((0, 1, 2), np.array([0.5, 0.3, -0.2, 0.1])), Request((), np.array([-0.3]))]
    with threadpool_limits(limits=2, user_api="blas"):
        statistics = BatchSource("arrays", watched_batches, get_family("poisson"), Scaling(x.mean(axis=0), x.std(axis=0))).evaluate(requests)
        after = blas_threads()
    assert seen == [{1}] * 4  # 200 rows in batches of 64
    assert after == {2}
    assert math.isfinite(statistics[0].deviance)


def test_a_pass_works_on_blocks_that_stay_in_the_cache_whatever_the_batch_size():
    """A 40,000-row batch is worked on in blocks of BLOCK_ROWS rows (16,384: their matrices stay in the
    cache between a pass's steps), with the sums that 1,000-row batches give."""
    terms, x, y, offset, weight = random_case("poisson", seed=5, rows=40_000)
    rows_seen = []

    class WatchedPoisson(type(get_family("poisson"))):
        def mean(self, eta):
            rows_seen.append(np.size(eta))
            return super().mean(eta)

    data = Batch(y, offset, weight, list(x.T))
    scaling = Scaling(x.mean(axis=0), x.std(axis=0))
    requests = [Request((0, 1, 2), np.array([0.5, 0.3, -0.2, 0.1])), Request((), np.array([-0.3]))]
    whole = BatchSource("arrays", in_memory_batches(data, 40_000), WatchedPoisson(), scaling).evaluate(requests)
    assert rows_seen == [BLOCK_ROWS] * 4 + [40_000 - 2 * BLOCK_ROWS] * 2  # model and null model per block
    small = BatchSource("arrays", in_memory_batches(data, 1000), get_family("poisson"), scaling).evaluate(requests)
    for have, want in zip(whole, small, strict=True):  # the same sums in another order: rounding only
        assert have.deviance == pytest.approx(want.deviance, rel=1e-12)
        np.testing.assert_allclose(have.xtwx, want.xtwx, rtol=1e-12)
        np.testing.assert_allclose(have.score, want.score, rtol=1e-9, atol=1e-9)


def test_warm_start_from_a_sample_reads_the_table_fewer_times(tmp_path):
    terms, x, y, _, _ = random_case("binomial", seed=3, rows=4000)
    engine, layout = duckdb_design(design_frame(terms, y), tmp_path)
    cold = Glm("binomial", sample_rows=5000).fit(engine, layout)  # sample holds every row: no warm start
    warm = Glm("binomial", sample_rows=1000).fit(engine, layout)
    assert warm.convergence.iterations < cold.convergence.iterations
    assert warm.convergence.passes_over_data == warm.convergence.iterations  # the first IRLS pass also gathers the profile
    np.testing.assert_allclose(warm.estimates, cold.estimates, rtol=1e-9)
    assert_matches(warm, statsmodels_fit("binomial", x, y))


def test_a_fitter_holds_parameters_and_each_fit_returns_its_own_result(tmp_path):
    # A bad parameter is refused when the fitter is made, before any engine or data is touched.
    with pytest.raises(ValueError, match="sample_rows must be at least 100: the sample also sets the working scaling"):
        Glm("poisson", sample_rows=99)
    with pytest.raises(ValueError, match="unknown statistics source 'spark'; use one of auto, sql, stream"):
        Glm("poisson", source="spark")
    glm = Glm("poisson")
    cases = [random_case("poisson", seed=13), random_case("poisson", seed=14, rows=300)]
    tables = [
        duckdb_design(design_frame(terms, y, offset, weight), tmp_path, f"design_{number}")
        for number, (terms, _, y, offset, weight) in enumerate(cases)
    ]
    first, second = (glm.fit(engine, layout) for engine, layout in tables)
    for fit, (_, x, y, offset, weight) in zip((first, second), cases, strict=True):
        assert_matches(fit, statsmodels_fit("poisson", x, y, offset, weight))
    assert (first.rows.n, second.rows.n) == (600, 300)
    # Nothing learned from the second data set stays with the fitter: the first fit comes back exactly.
    assert glm.fit(*tables[0]) == first


def test_arrays_and_engine_give_the_same_fit(tmp_path):
    terms, x, y, offset, weight = random_case("poisson", seed=8)
    engine, layout = duckdb_design(design_frame(terms, y, offset, weight), tmp_path)
    in_engine = Glm("poisson").fit(engine, layout)
    in_memory = Glm("poisson").fit_arrays(x, y, offset=offset, weights=weight, names=tuple(terms))
    assert in_memory.names == in_engine.names
    np.testing.assert_allclose(in_memory.estimates, in_engine.estimates, rtol=1e-9)
    assert in_memory.goodness_of_fit.aic == pytest.approx(in_engine.goodness_of_fit.aic, rel=1e-12)


def test_vif_is_the_textbook_vif_for_an_unweighted_gaussian_fit():
    terms, x, y, _, _ = random_case("gaussian", seed=2)
    fit = Glm("gaussian").fit_arrays(x, y, names=tuple(terms))
    exog = sm.add_constant(x)
    # Reference: statsmodels' variance_inflation_factor (regression of each term on the others).
    expected = [variance_inflation_factor(exog, j) for j in range(1, exog.shape[1])]
    intercept, *slopes = fit.coefficients
    assert intercept.vif is None
    np.testing.assert_allclose([slope.vif for slope in slopes], expected, rtol=1e-9)


def test_longley_matches_nist_certified_values(tmp_path):
    data = sm.datasets.longley.load_pandas()
    terms = {name: data.exog[name].to_numpy() for name in data.exog.columns}
    engine, layout = duckdb_design(design_frame(terms, data.endog.to_numpy()), tmp_path)
    for source in ("stream", "sql"):
        fit = Glm("gaussian", source=source).fit(engine, layout)
        # NIST StRD Longley certified values (recalled from memory; they agree digit for digit with
        # the NIST values statsmodels ships in statsmodels/regression/tests/results/results_regression.py).
        certified_coef = [-3482258.63459582, 15.0618722713733, -0.358191792925910e-01, -2.02022980381683,
                          -1.03322686717359, -0.511041056535807e-01, 1829.15146461355]
        certified_se = [890420.383607373, 84.9149257747669, 0.334910077722432e-01, 0.488399681651699,
                        0.214274163161675, 0.226073200069370, 455.478499142212]
        certified_residual_sd = 304.854073561965
        np.testing.assert_allclose(fit.estimates, certified_coef, rtol=1e-8)
        np.testing.assert_allclose(inference_of(fit, "std_error"), certified_se, rtol=1e-8)
        assert math.sqrt(fit.goodness_of_fit.dispersion) == pytest.approx(certified_residual_sd, rel=1e-9)
        assert fit.rows.df_residual == 9


def test_dobson_poisson_example(tmp_path):
    # Dobson (1990), Introduction to Generalized Linear Models, p. 93: counts by outcome and treatment
    # (the example R's `glm` help page and statsmodels' documentation reproduce).
    counts = [18, 17, 15, 20, 10, 20, 25, 13, 12]
    outcome = np.tile([1, 2, 3], 3)
    treatment = np.repeat([1, 2, 3], 3)
    terms = {
        "outcome2": (outcome == 2).astype(float), "outcome3": (outcome == 3).astype(float),
        "treatment2": (treatment == 2).astype(float), "treatment3": (treatment == 3).astype(float),
    }
    engine, layout = duckdb_design(design_frame(terms, counts), tmp_path)
    fit = Glm("poisson").fit(engine, layout)
    # As R prints it (recalled from memory): residual deviance 5.1291 on 4 df, null deviance 10.5814
    # on 8 df, AIC 56.761; intercept 3.045 (SE 0.1709), outcome2 -0.4543 (0.2022), outcome3 -0.2930 (0.1927).
    assert round(fit.goodness_of_fit.deviance, 4) == 5.1291
    assert fit.rows.df_residual == 4
    assert round(fit.goodness_of_fit.null_deviance, 4) == 10.5814
    assert round(fit.goodness_of_fit.aic, 2) == 56.76
    np.testing.assert_allclose(fit.estimates[:3], [3.045, -0.4543, -0.2930], atol=5e-4)
    np.testing.assert_allclose(inference_of(fit, "std_error")[:3], [0.1709, 0.2022, 0.1927], atol=5e-5)
    # Closed form: with no treatment effect in the data, the outcome means are the fitted values.
    assert fit.estimates[0] == pytest.approx(math.log(21.0), rel=1e-12)
    np.testing.assert_allclose(fit.estimates[3:], [0.0, 0.0], atol=1e-12)
    assert_matches(fit, statsmodels_fit("poisson", np.column_stack(list(terms.values())), np.array(counts, float)))


def test_spector_mazzeo_logit(tmp_path):
    data = sm.datasets.spector.load_pandas()
    terms = {name: data.exog[name].to_numpy() for name in ("GPA", "TUCE", "PSI")}
    engine, layout = duckdb_design(design_frame(terms, data.endog.to_numpy()), tmp_path)
    fit = Glm("binomial").fit(engine, layout)
    # Greene, Econometric Analysis, logit of GRADE on GPA, TUCE, PSI (recalled from memory).
    np.testing.assert_allclose(fit.estimates, [-13.0213, 2.8261, 0.0952, 2.3787], atol=1e-4)
    # Reference library: statsmodels' Logit on the same data.
    reference = sm.Logit(data.endog, sm.add_constant(data.exog[["GPA", "TUCE", "PSI"]])).fit(disp=0, tol=1e-12)
    np.testing.assert_allclose(fit.estimates, reference.params, rtol=1e-8)
    np.testing.assert_allclose(inference_of(fit, "std_error"), reference.bse, rtol=1e-6)
    assert fit.goodness_of_fit.log_likelihood == pytest.approx(reference.llf, rel=1e-10)
