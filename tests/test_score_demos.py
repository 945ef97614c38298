"""The committed demo fits scored on DuckDB, SQLite and PostgreSQL, against statsmodels on the design table.

Parity with the fit: the design table (built by `compute` in DuckDB) holds every term value of every
row; statsmodels' `GLM.predict(params, exog, offset)` (the reference library's inverse link) turns the
fitted coefficients into predictions there. The scoring SQL, which recomputes the terms from the fitted
file's SQL on the raw input table, must give the same predictions to 1e-12 relative on each engine,
and the same contributions and reason codes as numpy computes from the design table.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from conftest import copy_demo
from sqlglot import exp
from sqlite_engine import SQLiteEngine
from test_score import assert_same_scores, expected_scores, scored

from featpipe.api import compute
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.errors import FeatpipeError
from featpipe.fitted import read_fitted
from featpipe.fitted.scoring import render_score_sql, score
from featpipe.project import load_project
from featpipe.project.names import OFFSET_COLUMN
from featpipe.sqlgen.common import column

DEMO_MODELS = [("lease_default", "default_risk"), ("lease_default", "default_raw"), ("fleet_claims", "claim_frequency"),
               ("fleet_claims", "claim_severity")]
SM_FAMILIES = {"binomial": sm.families.Binomial(), "poisson": sm.families.Poisson(), "gaussian": sm.families.Gaussian(),
               "gamma": sm.families.Gamma(sm.families.links.Log())}
REASONS = 3


@pytest.fixture(scope="module", params=DEMO_MODELS, ids=[model for _, model in DEMO_MODELS])
def demo(request, tmp_path_factory):
    """A private copy of the demo project with its design table built, and what the scores must be."""
    name, model = request.param
    root = copy_demo(name, tmp_path_factory.mktemp(model))
    project = load_project(root)
    compute(project, [model])
    fitted = read_fitted(project.fitted_path(model))
    terms = [term.name for term in fitted.terms[1:]]
    offset = [OFFSET_COLUMN] if fitted.offset else []
    engine = DuckDBEngine(project.engine.path)
    query = exp.select(*map(column, [fitted.key, *terms, *offset])).from_(exp.to_table(f"design_{model}"))
    rows = engine.fetch(query.order_by(column(fitted.key)))
    engine.close()
    # A learned term's design columns from its argument, by numpy, from the constants in the fitted file.
    values = [learned_columns(term.learned, [row[index] for row in rows]) if term.learned
              else np.array([math.nan if row[index] is None else row[index] for row in rows], dtype=float)
              for index, term in enumerate(fitted.terms[1:], start=1)]
    offset_values = np.array([row[-1] for row in rows], dtype=float) if fitted.offset else None
    expected = expected_scores(fitted, values, REASONS, offset_values)

    design = np.column_stack([value if np.ndim(value) == 2 else value[:, None] for value in values])
    complete = ~np.isnan(design).any(axis=1)
    exog = sm.add_constant(design[complete], has_constant="add")
    glm = sm.GLM(np.zeros(complete.sum()), exog, family=SM_FAMILIES[fitted.family])
    params = np.array([fitted.terms[0].estimate] + [
        item["estimate"] for term in fitted.terms[1:] for item in (term.learned["columns"] if term.learned else [vars(term)])])
    reference = np.full(len(rows), math.nan)
    reference[complete] = glm.predict(params, exog, offset=offset_values[complete] if fitted.offset else None)
    return {"project": project, "fitted": fitted, "keys": [row[0] for row in rows], "expected": expected,
            "statsmodels": reference}


def learned_columns(learned: dict, values: list) -> np.ndarray:
    """A learned term's design columns (rows x columns) from its argument's values, written from the issue's
    definitions: LEVELS indicators (pooled levels in `other`), BINS right-closed indicators, CAPPED
    clipping, and the restricted cubic spline of Harrell, Regression Modeling Strategies (eq. 2.25),
    divided by (t_k - t_1)^2."""
    missing = np.array([value is None for value in values])
    if learned["function"] == "LEVELS":
        text = np.array(["" if value is None else str(value) for value in values])
        columns = [np.isin(text, learned["pooled"]) if item["label"] == "other" else text == item["label"]
                   for item in learned["columns"]]
    else:
        x = np.array([math.nan if value is None else value for value in values], dtype=float)
        t = np.array(learned["values"])
        if learned["function"] == "CAPPED":
            columns = [np.clip(x, *t)]
        elif learned["function"] == "BINS":
            columns = [(x > low) & (x <= high) for low, high in zip(t, [*t[1:], np.inf])]
        else:
            def cube(u):
                return np.where(u > 0, u, 0.0) ** 3

            k = len(t)
            columns = [x] + [(cube(x - t[j]) - cube(x - t[k - 2]) * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
                              + cube(x - t[k - 1]) * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2])) / (t[k - 1] - t[0]) ** 2
                             for j in range(k - 2)]
    matrix = np.column_stack(columns).astype(float)
    matrix[missing] = math.nan
    return matrix


@pytest.fixture(params=["duckdb", "sqlite", "postgres"])
def demo_engine(request, demo):
    """The engine with the demo's input table: DuckDB is the project's own (loaded by compute)."""
    project, fitted = demo["project"], demo["fitted"]
    if request.param == "duckdb":
        engine = DuckDBEngine(project.engine.path)
    elif request.param == "sqlite":
        engine = SQLiteEngine(None)
    else:
        engine = request.getfixturevalue("postgres_engine")
    if request.param != "duckdb":
        engine.load_file(fitted.input, project.inputs[fitted.input].load)
    yield engine
    if request.param != "postgres":
        engine.close()


def test_demo_scores_match_statsmodels_and_numpy_on_every_engine(demo, demo_engine):
    actual = scored(demo_engine, demo["fitted"], REASONS)
    assert actual["key"] == demo["keys"]
    np.testing.assert_allclose(actual["prediction"], demo["statsmodels"], rtol=1e-12, atol=0)
    assert_same_scores(actual, demo["expected"])
    assert demo["expected"]["status"].count("ok") > 0.9 * len(demo["keys"])


def test_editing_a_demo_term_after_the_fit_makes_score_refuse_and_leaves_the_exported_sql_alone(tmp_path):
    root = copy_demo("lease_default", tmp_path)
    before = render_score_sql(load_project(root), "default_risk", dialect="postgres", reasons=REASONS)
    terms = root / "terms" / "affordability.sql"
    terms.write_text(terms.read_text().replace("monthly_payment / NULLIF(monthly_revenue, 0)",
                                               "12 * monthly_payment / NULLIF(monthly_revenue, 0)"))
    with pytest.raises(FeatpipeError) as refused:
        score(load_project(root), "default_risk", table="leases", into="scores")
    # young_and_stretched is built from payment_to_revenue, so its meaning changed too.
    assert str(refused.value).startswith("fitted/default_risk.yaml is stale: term 'payment_to_revenue' changed meaning; "
                                         "term 'young_and_stretched' changed meaning; run `featpipe fit")
    assert render_score_sql(load_project(root), "default_risk", dialect="postgres", reasons=REASONS) == before
