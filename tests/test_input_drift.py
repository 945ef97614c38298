"""`featpipe drift` beyond the PSI: input columns' NULL rates and unseen text levels against the training
rows, the score's shift and out-of-range share in its reading, and `--fail-above` on each figure.

References outside the project: pandas on the same rows (the training rows recomputed with Python's
hashlib, MD5 of "salt:key" as tests/test_splits.py does) and numpy's PSI on the stated bins
(tests/test_drift.py's helpers). The demo lease model is fitted afresh in a copy of the demo; the
batches are drawn from the demo's own generator (invented data) and then changed here.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
import pytest
from conftest import copy_demo, run_featpipe
from test_drift import fresh_leases, lease_terms, levels_contribution, load_batches, numpy_psis

from featpipe import api
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.fitted import read_fitted
from featpipe.fitted.drift import MAJOR, STABLE, drift, reading
from featpipe.project import load_project

MODEL = "default_risk"
READ = ["firm_age_years", "monthly_payment", "monthly_revenue", "past_late_payments", "sector", "term_months"]


def training_rows(leases: pd.DataFrame) -> pd.DataFrame:
    """The rows not held out: MD5("v1:" key) at or above 0.3 of the hex range (the spec's holdout)."""
    limit = round(0.3 * 16**8)
    held = leases["lease_id"].map(lambda key: int(hashlib.md5(f"v1:{key}".encode()).hexdigest()[:8], 16) < limit)
    return leases[~held]


@pytest.fixture(scope="module")
def lease(tmp_path_factory):
    """A copy of the demo fitted afresh, with batches: gaps (5% of revenues missing, 3% of sectors 'mining',
    a level never seen), tail (6.7% of payments at three times the training maximum) and fresh (unchanged)."""
    root = copy_demo("lease_default", tmp_path_factory.mktemp("inputs"))
    project = load_project(root)
    api.fit(project, [MODEL])
    fresh = fresh_leases(root, seed=11)
    rng = np.random.default_rng(3)
    gaps = fresh.copy()
    gaps.loc[rng.random(len(gaps)) < 0.05, "monthly_revenue"] = None
    gaps.loc[rng.random(len(gaps)) < 0.03, "sector"] = "mining"
    tail = fresh.copy()
    top = pd.read_csv(root / "data" / "leases.csv")["monthly_payment"].max()
    tail.loc[tail.index[: round(0.067 * len(tail))], "monthly_payment"] = 3 * top
    frames = {"fresh": fresh, "gaps": gaps, "tail": tail}
    engine = DuckDBEngine(project.engine.path)
    try:
        load_batches(engine, root, frames)
    finally:
        engine.close()
    return root, frames


def test_the_fit_records_the_training_nulls_and_levels_of_every_input_column_read(lease):
    root, _ = lease
    fitted = read_fitted(root / "fitted" / f"{MODEL}.yaml")
    train = training_rows(pd.read_csv(root / "data" / "leases.csv"))
    # pandas on the training rows: NULLs per column, the distinct sectors
    assert fitted.input_profiles["rows"] == len(train)
    columns = fitted.input_profiles["columns"]
    assert list(columns) == READ
    assert {name: item["nulls"] for name, item in columns.items()} == {name: int(train[name].isna().sum()) for name in READ}
    assert columns["sector"]["levels"] == sorted(train["sector"].dropna().unique())
    assert all("levels" not in columns[name] for name in READ if name != "sector")


def test_drift_gives_null_rates_and_unseen_levels_as_pandas_does(lease):
    root, frames = lease
    report = drift(load_project(root), MODEL, "gaps")
    batch = frames["gaps"]
    train = training_rows(pd.read_csv(root / "data" / "leases.csv"))
    found = {item.name: item for item in report.inputs}
    assert list(found) == READ
    for name in READ:
        assert found[name].null_share == pytest.approx(batch[name].isna().mean(), abs=1e-15)
        assert found[name].training_null_share == pytest.approx(train[name].isna().mean(), abs=1e-15)
    seen = set(train["sector"].dropna())
    unseen = batch["sector"].notna() & ~batch["sector"].isin(seen)
    assert found["sector"].unseen_share == pytest.approx(unseen.mean(), abs=1e-15) and unseen.mean() > 0.02
    assert found["monthly_revenue"].null_rise == pytest.approx(batch["monthly_revenue"].isna().mean()
                                                               - train["monthly_revenue"].isna().mean(), abs=1e-15)
    assert all(found[name].unseen_share is None for name in READ if name != "sector")


def test_a_score_moved_with_rows_far_above_the_training_maximum_does_not_read_stable(lease):
    root, frames = lease
    fitted = read_fitted(root / "fitted" / f"{MODEL}.yaml")
    report = drift(load_project(root), MODEL, "tail")
    score = report.score
    # numpy on the same bins: the score's PSI alone reads stable ...
    psi = numpy_psis(frames["tail"], fitted)["linear_predictor"]
    assert score.psi == pytest.approx(psi, rel=1e-9)
    assert reading(psi) == STABLE
    # ... but 6.7% of the rows lie above the training maximum and the mean moved: not stable
    terms = lease_terms(frames["tail"])
    linear = fitted.terms[0].estimate + sum(levels_contribution(frames["tail"]["sector"], term.learned) if term.learned
                                            else term.estimate * terms[term.name] for term in fitted.terms[1:])
    assert score.above_max_share == pytest.approx(np.mean(linear > fitted.linear_predictor.max), abs=1e-15)
    assert score.above_max_share > 0.06 and score.psi < 0.1
    assert score.reading == MAJOR
    assert any("outside the training range" in why for why in score.reasons)
    assert score.shift > 0.3


def test_a_batch_from_the_training_distribution_still_reads_stable(lease):
    root, _ = lease
    report = drift(load_project(root), MODEL, "fresh")
    assert report.score.reading == STABLE and report.score.reasons == ()
    assert {row.reading for row in report.terms} == {STABLE}
    assert all(item.unseen_share in (None, 0.0) for item in report.inputs)


@pytest.mark.parametrize("limits, message", [
    (["unseen=0.01"], "unseen above 0.01: sector (0.0"),
    (["null_rise=0.02"], "null_rise above 0.02: monthly_revenue (0.0"),
    (["unseen=0.5", "null_rise=0.5"], None),
])
def test_fail_above_gates_on_the_input_figures(lease, limits, message):
    root, _ = lease
    arguments = [item for limit in limits for item in ("--fail-above", limit)]
    result = run_featpipe("drift", MODEL, "--table", "gaps", *arguments, "-p", str(root))
    if message is None:
        assert result.returncode == 0, result.stderr
    else:
        assert result.returncode == 1 and message in result.stderr
    assert "Traceback" not in result.stderr
    assert "input columns against the training rows" in result.stdout


def test_fail_above_gates_on_the_score_figures(lease):
    root, frames = lease
    fitted = read_fitted(root / "fitted" / f"{MODEL}.yaml")
    result = run_featpipe("drift", MODEL, "--table", "tail", "--fail-above", "outside=0.05", "-p", str(root))
    # pandas: the share of the batch's payments above the training maximum of the term
    above = (frames["tail"]["monthly_payment"] > fitted.term("monthly_payment").profile.max).mean()
    assert result.returncode == 1 and f"monthly_payment ({above:.4g})" in result.stderr
    assert result.stderr.splitlines()[-1].startswith("outside above 0.05: ") and "linear_predictor (" in result.stderr
    result = run_featpipe("drift", MODEL, "--table", "tail", "--fail-above", "shift=0.3", "-p", str(root))
    assert result.returncode == 1 and "shift above 0.3: " in result.stderr and "linear_predictor (" in result.stderr
    assert run_featpipe("drift", MODEL, "--table", "fresh", "--fail-above", "shift=0.3", "--fail-above", "outside=0.05",
                        "-p", str(root)).returncode == 0


def test_fail_above_refuses_a_figure_it_does_not_know(lease):
    root, _ = lease
    result = run_featpipe("drift", MODEL, "--table", "fresh", "--fail-above", "nulls=0.1", "-p", str(root))
    assert result.returncode == 1
    assert ("--fail-above nulls=0.1: give LIMIT (for the PSI) or NAME=LIMIT with NAME one of psi, shift, outside, "
            "null_rise, unseen, e.g. --fail-above unseen=0.01") in result.stderr
    assert "Traceback" not in result.stderr
