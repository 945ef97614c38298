"""Reason codes chosen in K rounds of GREATEST and comparisons give the names a full ranking gives, on
every engine, for 20 terms with many ties, negative and NULL contributions.

Reference: a Python ranking of each row's contributions (largest first, an earlier term first on a
tie, positive ones only), the rule `score_query` documents.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from test_score import engine  # noqa: F401  (the engines every scoring test runs on)
from sqlglot import exp

from featpipe.sqlgen.score import ScoringModel, ScoringTerm, score_query

TERMS = 20
ROWS = 400


def wide_model() -> ScoringModel:
    """20 plain terms, coefficients of both signs and some equal, so contributions tie often."""
    estimates = [1.0, -1.0, 0.5, 1.0, 2.0, -0.5, 1.0, 0.25, -2.0, 1.0] * 2
    terms = tuple(ScoringTerm(f"x{j:02d}", f'"x{j:02d}"', is_boolean=False, estimate=estimates[j], mean=0.0) for j in range(TERMS))
    columns = {"id": "BIGINT", **{term.name: "DOUBLE" for term in terms}}
    return ScoringModel("id", "wide", "gaussian", 0.5, None, columns, terms, "fitted/wide.yaml")


def wide_data() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(13)
    data = {"id": np.arange(ROWS, dtype=np.int64)}
    for j in range(TERMS):
        values = rng.integers(-2, 3, ROWS).astype(float)  # few distinct values: ties in most rows
        values[rng.uniform(size=ROWS) < 0.01] = np.nan
        data[f"x{j:02d}"] = values
    return data


def expected_reasons(model: ScoringModel, data: dict, reasons: int) -> list[list[str | None]]:
    out = []
    for row in range(ROWS):
        values = [data[term.name][row] for term in model.terms]
        if any(np.isnan(values)):
            out.append([None] * reasons)
            continue
        contributions = [term.estimate * (value - term.mean) for term, value in zip(model.terms, values)]
        pushing = sorted((-c, index) for index, c in enumerate(contributions) if c > 0)
        names = [model.terms[index].name for _, index in pushing[:reasons]]
        out.append(names + [None] * (reasons - len(names)))
    return out


@pytest.mark.parametrize("reasons", [1, 3, 20])
def test_reasons_equal_a_full_ranking_on_every_engine(engine, tmp_path, reasons):  # noqa: F811
    model, data = wide_model(), wide_data()
    path = tmp_path / "wide.parquet"
    pq.write_table(pa.table({name: pa.array(values, from_pandas=True) for name, values in data.items()}), path)
    engine.load_file("wide", path)
    query = score_query(model, reasons=reasons)
    names = [projection.alias_or_name for projection in query.expressions]
    rows = sorted(engine.fetch(query), key=lambda row: row[0])
    first = names.index("reason_1")
    assert [list(row[first:first + reasons]) for row in rows] == expected_reasons(model, data, reasons)


@pytest.mark.spark
def test_reasons_equal_a_full_ranking_on_spark(spark_engine, tmp_path):
    test_reasons_equal_a_full_ranking_on_every_engine(spark_engine, tmp_path, 3)


def test_three_reasons_of_twenty_terms_cost_a_few_comparisons_per_term():
    """A full ranking compares every pair (20 x 19 per row); a round compares each term at most twice
    (setting the last pick aside, finding the top) and names its pick directly, so three rounds need
    at most 2 x 3 x 20 comparisons, plus the completeness check of each contribution."""
    query = score_query(wide_model(), reasons=3)
    comparisons = sum(1 for _ in query.find_all(exp.EQ, exp.GT, exp.GTE, exp.LT, exp.LTE))
    # status checks (IS NULL) are not comparisons; the count grows linearly with the terms
    assert comparisons <= TERMS + 2 * 3 * TERMS, comparisons


def test_the_reasons_read_the_contributions_as_computed_and_test_the_status_once_per_output():
    """Where the status is not 'ok' the output has no contribution and no reason; the rounds read the
    contributions as computed (no status test per term and row inside them), and the final SELECT tests
    the status once per contribution and reason column it writes."""
    query = score_query(wide_model(), reasons=3)

    def status_tests(node: exp.Expression) -> int:
        return sum(1 for test in node.find_all(exp.EQ)
                   if isinstance(test.this, exp.Column) and test.this.name == "status" and test.expression == exp.Literal.string("ok"))

    assert [status_tests(cte.this) for cte in query.ctes] == [0] * len(query.ctes)
    assert status_tests(query) == TERMS + 3
