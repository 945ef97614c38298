"""The quantiles of BINS, SPLINE and CAPPED terms are the values at exact ranks ceil(q n) of the training
rows, the same on DuckDB, PostgreSQL and Spark, and Spark learns them without PERCENTILE_DISC.

Reference: numpy's quantile(method="inverted_cdf") asked for the fraction (r - 1/2) / n of the rank r =
ceil(q n), computed here with Python's exact fractions (see the edge case below).
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from conftest import write_project
from recording import Recording
from test_learned_terms import LEASES_YAML

from featpipe import api
from featpipe.fitting.learned import learn_constants

TERMS = ("SELECT BINS(income, 14) AS income_band,\n  CAPPED(income, 0.07, 0.93) AS capped_income,\n"
         "  SPLINE(income, 4) AS income_curve FROM leases\n")
SPEC = ("input: leases\ntarget: defaulted\nfamily: binomial\nterms: [income_band, capped_income, income_curve]\n"
        "holdout: {column: lease_id, from: 51}\n")
TRAINING = 42  # leases 1..42: incomes; 43..50: no income (left out); 51..60: held out


def incomes() -> list[float | None]:
    """Per lease (1..60): the 42 training incomes r // 2 + 0.25 for ranks r = 1..42 (ties in pairs, 2 and 3,
    4 and 5, ..., so ranks 27 and 28 differ), in a shuffled order; no income for 43..50; and held-out
    incomes far above every training one, which would move the upper quantiles if they were read."""
    training = [r // 2 + 0.25 for r in range(1, TRAINING + 1)]
    order = np.random.default_rng(3).permutation(TRAINING)
    return [training[i] for i in order] + [None] * 8 + [1000.0 + i for i in range(10)]


def write_leases(root, engine_block: str | None = None):
    lines = ["lease_id,sector,branch,income,defaulted"]
    lines += [f"{i},retail,1,{'' if x is None else repr(x)},{i % 2}" for i, x in enumerate(incomes(), start=1)]
    settings = LEASES_YAML if engine_block is None else LEASES_YAML.replace(
        "  kind: duckdb\n  path: build/leases.duckdb\n", engine_block)
    write_project(root, {"featpipe.yaml": settings, "data/orders.csv": None, "data/leases.csv": "\n".join(lines) + "\n",
                         "terms/basket.sql": None, "specs/returns.yaml": None, "terms/lease.sql": TERMS,
                         "specs/risk.yaml": SPEC})
    return root


def learned_values(root) -> tuple[dict[str, tuple[float, ...]], list[str]]:
    """Compute the design table, learn the constants; their values per term and the SQL the engine ran."""
    project = api.load_project(root)
    api.compute(project, ["risk"])
    model = api.check(project).models["risk"]
    with api.connect(project) as engine:
        recording = Recording(engine)
        constants = learn_constants(recording, model)
    return {name: found.values for name, found in constants.items()}, recording.queries


def reference_values() -> dict[str, list[float]]:
    """numpy's inverted CDF at the exact ranks ceil(q n) of the training incomes, n = 42.

    The edge case: BINS(income, 14) has the quantile 9/14, and 9/14 * 42 = 27 exactly, so its rank is 27.
    As a double 9/14 is 0.6428571428571429, a little above 9/14, and 42 times it is 27.000000000000004, so
    numpy's quantile(x, 9/14, method="inverted_cdf") answers rank 28, and so did each engine's percentile
    aggregate asked for 9/14 (measured on this machine: DuckDB quantile_disc, PostgreSQL 15 percentile_disc,
    Spark 4 PERCENTILE_DISC; PostgreSQL and Spark also answer rank 8 for CAPPED's 0.07 of 100 values, DuckDB
    rank 7). We keep the documented rule, the value at rank ceil(q n) for the quantile as the term file
    means it (j/k for BINS, the decimal written for CAPPED and SPLINE): a float's last bit must not move an
    edge, and exact integer ranks give the same constants on every engine.
    """
    training = np.array(incomes()[:TRAINING])
    n = len(training)

    def at_exact_ranks(quantiles):
        ranks = [max(1, math.ceil(q * n)) for q in quantiles]
        return np.quantile(training, [(r - 0.5) / n for r in ranks], method="inverted_cdf")

    edges = at_exact_ranks([Fraction(j, 14) for j in range(1, 14)])
    assert edges[8] == 13.25 and np.quantile(training, 9 / 14, method="inverted_cdf") == 14.25  # the edge case is hit
    return {
        "income_band": np.unique(edges).tolist(),
        "capped_income": at_exact_ranks([Fraction("0.07"), Fraction("0.93")]).tolist(),
        # Knots of SPLINE(x, 4) at 0.05, 0.35, 0.65, 0.95 (Harrell's table, as featpipe.compiler.learned).
        "income_curve": at_exact_ranks([Fraction("0.05"), Fraction("0.35"), Fraction("0.65"), Fraction("0.95")]).tolist(),
    }


def spark_block(spark_engine) -> str:
    return f"  kind: spark\n  path: build/spark\n  database: {spark_engine.database}\n"


@pytest.fixture(params=["duckdb", "postgres", pytest.param("spark", marks=pytest.mark.spark)])
def engine_block(request, monkeypatch):
    if request.param == "duckdb":
        return None
    if request.param == "postgres":
        monkeypatch.setenv("FEATPIPE_TEST_DSN", request.getfixturevalue("postgres_engine").dsn)
        return "  kind: postgres\n  dsn: ${FEATPIPE_TEST_DSN}\n"
    return spark_block(request.getfixturevalue("spark_engine"))


def test_learned_quantiles_are_the_values_at_exact_ranks_on_every_engine(engine_block, tmp_path):
    values, _ = learned_values(write_leases(tmp_path / "leases", engine_block))
    assert {name: list(found) for name, found in values.items()} == reference_values()


@pytest.mark.spark
def test_spark_learns_quantiles_by_brackets_not_by_percentile_disc_or_a_window(spark_engine, tmp_path):
    """Spark's PERCENTILE_DISC keeps a hash map of every distinct value per fraction in the JVM's memory (16
    columns of 1M distinct values ended the session on an out-of-memory error for the profiles); a window
    sorts every distinct value. A quantile summary brackets the ranks instead (the values: the test above)."""
    _, queries = learned_values(write_leases(tmp_path / "leases", spark_block(spark_engine)))
    rendered = "\n".join(queries).upper()
    assert "PERCENTILE_DISC" not in rendered and " OVER " not in rendered and "PERCENTILE_APPROX" in rendered
