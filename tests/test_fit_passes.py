"""How many times a fit reads the training rows: written in the fitted file, checked when read back,
and at most three for a large unpenalized fit (a warm start from a sample, the profile gathered in the
first pass).

References: statsmodels' GLM (Binomial) fitted on the same rows for the coefficients; the passes
are counted by the statistics source itself (`Convergence.passes_over_data`).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml
from conftest import copy_demo

from featpipe import api
from featpipe.compiler.layout import DesignLayout
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.errors import FeatpipeError
from featpipe.fitted import read_fitted
from featpipe.glm import Glm

ROWS = 120_000
LAYOUT = DesignLayout("design_wide", "id", "_target", ("a", "b", "c"))


def test_the_fitted_file_says_how_many_passes_the_fit_made(tmp_path):
    project = api.load_project(copy_demo("lease_default", tmp_path / "lease"))
    (outcome,) = api.fit(project, ["default_risk"])
    fit = read_fitted(outcome.path).fit
    # The demo's rows are fewer than the warm-start sample: the sample reads them all, then every IRLS
    # iteration is a pass over them in memory, the training profile gathered during the first.
    assert fit["passes"] == 1 + fit["iterations"] and fit["iterations"] > 0


def test_a_passes_count_that_is_not_a_count_is_refused(tmp_path):
    project = api.load_project(copy_demo("lease_default", tmp_path / "lease"))
    path = project.fitted_path("default_risk")
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    data["fit"]["passes"] = -3
    path.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
    with pytest.raises(FeatpipeError) as refused:
        read_fitted(path)
    assert "fit.passes must be a whole number of at least 0, not '-3'" in str(refused.value)


@pytest.fixture
def wide_engine(tmp_path):
    rng = np.random.default_rng(5)
    x = rng.normal(size=(ROWS, 3)) * [1.0, 5.0, 0.2] + [0.0, 2.0, -1.0]
    eta = -0.4 + x @ [0.8, -0.1, 2.0]
    target = (rng.uniform(size=ROWS) < 1 / (1 + np.exp(-eta))).astype(float)
    table = {"id": np.arange(ROWS), "_target": target, "_holdout": np.zeros(ROWS, dtype=bool),
             "a": x[:, 0], "b": x[:, 1], "c": x[:, 2]}
    path = tmp_path / "wide.parquet"
    pq.write_table(pa.table(table), path)
    engine = DuckDBEngine(tmp_path / "wide.duckdb")
    engine.load_file(LAYOUT.table, path)
    yield engine, x, target
    engine.close()


def test_a_warm_started_fit_reads_the_rows_fewer_times_and_agrees_with_statsmodels(wide_engine):
    import statsmodels.api as sm

    engine, x, target = wide_engine
    warm = Glm("binomial", sample_rows=30_000).fit(engine, LAYOUT)  # the sample is a quarter of the rows
    cold = Glm("binomial", sample_rows=2 * ROWS, source="stream").fit(engine, LAYOUT)  # the sample is every row: no warm start
    # Two or three Newton passes from the warm start, and one more when the last change was between
    # SETTLED and tol (X'WX evaluated at the final coefficients); from the cold start five or six.
    assert warm.convergence.converged and warm.convergence.passes_over_data <= 4 < cold.convergence.passes_over_data
    reference = sm.GLM(target, sm.add_constant(x), family=sm.families.Binomial()).fit(tol=1e-12)  # statsmodels IRLS
    np.testing.assert_allclose(warm.estimates, reference.params, rtol=1e-8)
    np.testing.assert_allclose(warm.estimates, cold.estimates, rtol=1e-9)
