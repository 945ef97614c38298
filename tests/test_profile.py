"""Training profiles computed in SQL, checked against numpy on DuckDB, SQLite and PostgreSQL.

Reference: numpy's quantile with method="inverted_cdf" (the order statistic at ceil(q n)), np.median,
np.std(ddof=1), and bin counts from np.searchsorted (side="left" puts v in bin i when
edges[i-1] < v <= edges[i], the rule of `Profile`). Counts, edges, shares, min, max and median must
be exact; mean and sd (sums in a different order) to 1e-12.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from test_metrics import (  # the engines every SQL test runs on
    ENGINE_KINDS,
    open_engine,
)

from featpipe.compiler.layout import DesignLayout
from featpipe.fitting.metrics import training_profiles
from featpipe.fitted import INTERCEPT, Profile
from featpipe.sqlgen.common import column
from featpipe.sqlgen.metrics import linear_predictor
from featpipe.sqlgen.profile import decile_rank

ROWS = 537
LAYOUT = DesignLayout(
    "design_leases", "lease_id", "_target",
    ("payment_ratio", "late_payments", "fleet_size", "never_set", "single_value"),
)
COEFFICIENTS = {INTERCEPT: -1.25, "payment_ratio": 2.5, "late_payments": 0.75, "fleet_size": -0.125}


def invented_design() -> dict[str, np.ndarray]:
    """Invented rows: a continuous term with repeated values and NULLs, a count with heavy ties (its
    deciles collapse), a term NULL except in one training row, one that is never set."""
    rng = np.random.default_rng(7)
    holdout = rng.uniform(size=ROWS) < 0.3
    never = np.full(ROWS, np.nan)
    single = np.full(ROWS, np.nan)
    single[np.flatnonzero(~holdout)[3]] = 4.5
    return {
        "lease_id": rng.permutation(ROWS).astype(np.int64) + 1000,
        "_target": rng.integers(0, 2, ROWS).astype(float),
        "_holdout": holdout,
        "payment_ratio": np.where(rng.uniform(size=ROWS) < 0.08, np.nan, np.round(rng.gamma(2.0, 0.15, ROWS), 2)),
        "late_payments": rng.poisson(0.6, ROWS).astype(float),
        "fleet_size": np.where(rng.uniform(size=ROWS) < 0.02, np.nan, rng.integers(1, 40, ROWS).astype(float)),
        "never_set": never,
        "single_value": single,
    }


@pytest.fixture(params=ENGINE_KINDS)
def engine(request, tmp_path):
    path = tmp_path / "design.parquet"
    data = invented_design()
    pq.write_table(pa.table({name: pa.array(values, from_pandas=True) for name, values in data.items()}), path)
    engine = open_engine(request)
    engine.load_file(LAYOUT.table, path)
    yield engine
    if request.param != "postgres":  # the postgres fixture closes its own engine
        engine.close()


def reference_profile(values: np.ndarray) -> Profile:
    """The profile of the training-side values (NaN = NULL) computed with numpy."""
    present = values[~np.isnan(values)]
    if len(present) == 0:
        return Profile(0, len(values), None, None, None, None, None, (), ())
    deciles = np.quantile(present, np.arange(1, 10) / 10, method="inverted_cdf")
    edges = tuple(float(v) for v in np.unique(deciles))
    bins = np.bincount(np.searchsorted(edges, present, side="left"), minlength=len(edges) + 1)
    return Profile(
        count=len(present),
        nulls=int(np.isnan(values).sum()),
        mean=float(present.mean()),
        sd=float(present.std(ddof=1)) if len(present) > 1 else None,
        min=float(present.min()),
        max=float(present.max()),
        median=float(np.median(present)),
        edges=edges,
        shares=tuple(float(count) / len(present) for count in bins),
    )


def assert_profile(got: Profile, expected: Profile) -> None:
    assert (got.count, got.nulls, got.min, got.max, got.median, got.edges, got.shares) == (
        expected.count, expected.nulls, expected.min, expected.max, expected.median, expected.edges, expected.shares)
    for name in ("mean", "sd"):
        value = getattr(expected, name)
        assert getattr(got, name) == (None if value is None else pytest.approx(value, rel=1e-12)), name


def test_term_profiles_match_numpy(engine):
    data = invented_design()
    training = ~data["_holdout"]
    profiles = training_profiles(engine, LAYOUT, {name: column(name) for name in LAYOUT.terms})
    assert list(profiles) == list(LAYOUT.terms)
    for name in LAYOUT.terms:
        assert_profile(profiles[name], reference_profile(data[name][training]))
    # The data exercise what they should: NULLs among training rows, collapsed edges, a one-value term.
    assert profiles["payment_ratio"].nulls > 0
    assert len(profiles["late_payments"].edges) < 9
    assert profiles["single_value"] == Profile(1, int(training.sum()) - 1, 4.5, None, 4.5, 4.5, 4.5, (4.5,), (1.0, 0.0))
    assert profiles["never_set"].count == 0


def test_linear_predictor_profile_matches_numpy(engine):
    data = invented_design()
    training = ~data["_holdout"]
    layout = DesignLayout(LAYOUT.table, LAYOUT.key, LAYOUT.target, ("payment_ratio", "late_payments", "fleet_size"))
    # numpy's linear predictor in the SQL's order of operations; a NULL term makes it NULL (NaN).
    eta = np.full(ROWS, COEFFICIENTS[INTERCEPT])
    for name in layout.terms:
        eta = eta + COEFFICIENTS[name] * data[name]
    coefficients = {name: COEFFICIENTS[name] for name in (INTERCEPT, *layout.terms)}
    profiles = training_profiles(engine, layout, {"linear_predictor": linear_predictor(layout, coefficients)})
    assert_profile(profiles["linear_predictor"], reference_profile(eta[training]))


@pytest.mark.parametrize("n", [1, 2, 9, 10, 11, 29, 30, 31, 99, 100, 101, 537])
def test_decile_rank_is_numpys_inverted_cdf_order_statistic(n):
    ordered = np.arange(n, dtype=float)
    for k in range(1, 10):
        assert ordered[decile_rank(k, n) - 1] == np.quantile(ordered, k / 10, method="inverted_cdf")
