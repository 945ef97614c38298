"""Learned terms on PostgreSQL and Spark: every learned term (LEVELS with pooled levels, CAPPED, BINS,
SPLINE) fits, scores and drifts as on DuckDB, and the scoring SQL exported for PostgreSQL, run by psql
alone, gives `featpipe score`'s answers.

References: the real engines themselves, against the DuckDB run (whose learned constants and fits
test_learned_terms checks against numpy and statsmodels): every number of the fitted file to 1e-9
relative, the learned constants (exact order statistics and level counts) exactly, and the scores of a
batch holding a level no training row had to 1e-9.
"""

from __future__ import annotations

import math
import shutil

import pandas as pd
import pytest
import yaml
from sqlglot import exp
from test_learned_review import LEARNED, TERMS
from test_learned_terms import lease_project
from test_pipeline_engines import plain, same_numbers
from test_psql_export import close, featpipe, run_psql

from featpipe import api
from featpipe.fitted.drift import drift
from featpipe.fitted.scoring import score
from featpipe.project.names import LINEAR_PREDICTOR, STATUS

DUCKDB_BLOCK = "  kind: duckdb\n  path: build/leases.duckdb\n"
# A batch of the training table where every fifth lease is from a sector never seen in training.
BATCH = exp.select('"lease_id"', "CASE WHEN lease_id % 5 = 0 THEN 'whaling' ELSE sector END AS sector",
                   '"branch"', '"income"', '"defaulted"').from_("leases")


def run_learned(root, block: str | None) -> dict:
    """Fit, score the batch and drift-check it on the engine of `block` (None: DuckDB)."""
    if block is not None:
        settings = root / "featpipe.yaml"
        settings.write_text(settings.read_text(encoding="utf-8").replace(DUCKDB_BLOCK, block), encoding="utf-8")
    project = api.load_project(root)
    api.compute(project, ["risk"])
    api.fit(project, ["risk"])
    with api.connect(project) as engine:
        engine.create_table("batch", BATCH)
    score(project, "risk", table="batch", into="scored", reasons=2)
    with api.connect(project) as engine:
        scores = engine.fetch_frame(exp.select("*").from_("scored")).sort_values("lease_id", ignore_index=True)
    return {"project": project, "fitted": yaml.safe_load(project.fitted_path("risk").read_text(encoding="utf-8")),
            "scores": scores, "drift": drift(project, "risk", "batch")}


@pytest.fixture(scope="module")
def learned_source(tmp_path_factory):
    root, _ = lease_project(tmp_path_factory.mktemp("learned_source"), TERMS, LEARNED)
    return root


@pytest.fixture(scope="module")
def duckdb_learned(learned_source, tmp_path_factory):
    root = tmp_path_factory.mktemp("duckdb") / "leases"
    shutil.copytree(learned_source, root)
    return run_learned(root, None)


@pytest.fixture
def postgres_learned(learned_source, tmp_path, postgres_engine, monkeypatch):
    monkeypatch.setenv("FEATPIPE_TEST_DSN", postgres_engine.dsn)
    root = tmp_path / "leases"
    shutil.copytree(learned_source, root)
    return {**run_learned(root, "  kind: postgres\n  dsn: ${FEATPIPE_TEST_DSN}\n"), "engine": postgres_engine}


@pytest.fixture
def spark_learned(learned_source, tmp_path, spark_engine):
    root = tmp_path / "leases"
    shutil.copytree(learned_source, root)
    return run_learned(root, f"  kind: spark\n  path: build/spark\n  database: {spark_engine.database}\n")


@pytest.fixture(params=["postgres", pytest.param("spark", marks=pytest.mark.spark)])
def other_learned(request):
    return request.param, request.getfixturevalue(f"{request.param}_learned")


def test_every_learned_term_fits_scores_and_drifts_alike_on_postgres_and_spark(duckdb_learned, other_learned):
    engine, theirs = other_learned
    mine = duckdb_learned
    # Learned constants are order statistics and counts: exactly the same.
    for name in LEARNED:
        (my_term,) = [t for t in mine["fitted"]["terms"] if t["name"] == name]
        (their_term,) = [t for t in theirs["fitted"]["terms"] if t["name"] == name]
        for key in ("levels", "reference", "pooled", "values"):
            assert their_term["learned"].get(key) == my_term["learned"].get(key), (engine, name, key)
    # Everything else in the fitted file to 1e-9, but the passes over the rows: a streamed DuckDB fit
    # reads them fewer times than SQL aggregates do.
    for fitted in (mine["fitted"], theirs["fitted"]):
        fitted["fit"].pop("passes", None)
    assert same_numbers(mine["fitted"], theirs["fitted"]) == [], engine
    # Scores of the batch (an unseen level goes to `other`): the same statuses, numbers to 1e-9. The file
    # writes coefficients to 12 significant digits, so fits that agree to 1e-12 may still differ in a last
    # digit (measured: 3.9e-12 on a spline column whose values reach ~100), which moves a linear predictor
    # near 0 by ~1e-10: absolute, as relative to it, 1e-9.
    left, right = mine["scores"], theirs["scores"]
    assert list(right.columns) == list(left.columns)
    for name in left.columns:
        if pd.api.types.is_numeric_dtype(left[name]) and name != "lease_id":
            assert right[name].astype(float).tolist() == pytest.approx(left[name].astype(float).tolist(), rel=1e-9,
                                                                       abs=1e-9, nan_ok=True), (engine, name)
        else:
            assert plain(right[name].astype(object)) == plain(left[name].astype(object)), (engine, name)
    assert (left[STATUS] == "ok").all()
    for my_row, their_row in zip(mine["drift"].terms, theirs["drift"].terms, strict=True):
        assert (their_row.name, [b.rows for b in their_row.bins], their_row.unseen) == \
            (my_row.name, [b.rows for b in my_row.bins], my_row.unseen), engine
        assert their_row.psi == pytest.approx(my_row.psi, rel=1e-9, abs=1e-15), (engine, my_row.name)
    assert [row.unseen for row in mine["drift"].terms if row.unseen] == [(("whaling", 300),)]


def test_exported_learned_scoring_sql_runs_in_psql_and_gives_featpipe_scores(postgres_learned, tmp_path):
    root = postgres_learned["project"].root
    exported = tmp_path / "score.sql"
    exported.write_text(featpipe("sql", "risk", "-p", str(root), "--part", "score", "--dialect", "postgres",
                                 "--table", "batch", "--reasons", "2"), encoding="utf-8")
    from_psql = run_psql(exported, postgres_learned["engine"].dsn)
    frame = postgres_learned["scores"]
    assert list(from_psql[0]) == list(frame.columns)
    by_key = {int(row["lease_id"]): row for row in from_psql}
    assert sorted(by_key) == frame["lease_id"].tolist()
    for record in frame.to_dict("records"):
        row = by_key[int(record["lease_id"])]
        for column_name, value in record.items():
            value = None if isinstance(value, float) and math.isnan(value) else value
            close(row[column_name], value, (record["lease_id"], column_name))
    assert all(row[LINEAR_PREDICTOR] is not None for row in from_psql)
