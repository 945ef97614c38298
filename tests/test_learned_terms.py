"""Learned terms (LEVELS, BINS, SPLINE, CAPPED): recognised and checked by the compiler, constants learned
from the training rows in the engine, several design columns per term, fitted and scored as one term."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from conftest import write_project
from sqlglot import exp

from featpipe import api
from featpipe.compiler import compile_project
from featpipe.engines.compute import connect
from featpipe.fitted import read_fitted
from featpipe.errors import FeatpipeError
from featpipe.project import load_project


def errors_of(root, text: str) -> list[str]:
    write_project(root, {"terms/learned.sql": text})
    with pytest.raises(FeatpipeError) as caught:
        compile_project(load_project(root))
    return [str(d) for d in caught.value.diagnostics]


def test_a_learned_call_compiles_to_its_argument_with_a_fingerprint_of_the_whole_call(tmp_path):
    write_project(tmp_path, {"terms/learned.sql": "SELECT LEVELS(region, 2) AS region_level,\n"
                                                  "  levels(region, 3) AS region_level3,\n"
                                                  "  CAPPED(amount, 0.05, 0.95) AS capped_amount FROM orders\n"})
    terms = compile_project(load_project(tmp_path)).terms
    levels, levels3, capped = terms["region_level"], terms["region_level3"], terms["capped_amount"]
    assert (levels.sql, levels.kind, levels.learned.function, levels.learned.arguments) == ('"region"', "text", "LEVELS", (2,))
    assert levels.fingerprint != levels3.fingerprint  # min_rows is part of the term's meaning
    assert (capped.sql, capped.kind, capped.learned.arguments) == ('"amount"', "numeric", (0.05, 0.95))


@pytest.mark.parametrize(("call", "message"), [
    ("LEVELS(region)", "1:8: LEVELS takes 2 arguments: write LEVELS(expr, min_rows)"),
    ("LEVELS(region, 0)", "1:23: LEVELS needs min_rows as a whole number of at least 1, not 0"),
    ("LEVELS(region, items)", "1:23: LEVELS's arguments after the expression must be numbers: write LEVELS(expr, min_rows)"),
    ("BINS(amount, 1)", "1:21: BINS takes 2 to 20 bins, not 1"),
    ("BINS(amount, 2.5)", "1:21: BINS takes 2 to 20 bins, not 2.5"),
    ("SPLINE(amount, 8)", "1:23: SPLINE takes 3 to 7 knots, not 8"),
    ("CAPPED(amount, 0.9, 0.1)", "1:23: CAPPED needs 0 <= p_low < p_high <= 1, not 0.9 and 0.1"),
    ("1 + CAPPED(amount, 0.1, 0.9)", "1:12: CAPPED(...) must be the whole expression of a term: write it as its own "
                                     "projection and do not use it inside another expression"),
    ("LEVELS(amount, 5)", "1:15: LEVELS reads text or whole numbers; for a decimal number use BINS(expr, k)"),
    ("SPLINE(region, 4)", "1:15: SPLINE reads a number, not a text expression"),
    ("BINS(amount > 1, 4)", "1:13: BINS reads a number, not a boolean expression"),
    ("LEVELS(region + 1, 5)", "1:15: arithmetic on text: 'region' is TEXT; compare it to a value (e.g. CASE WHEN "
                              "x = 'a' THEN 1 ELSE 0 END) or CAST it"),
])
def test_learned_call_problems_are_positioned(tmp_path, call, message):
    assert errors_of(tmp_path, f"SELECT\n       {call} AS learned FROM orders\n") == [
        f"terms/learned.sql:{int(message.split(':')[0]) + 1}:{message.split(':', 1)[1]}"]


def test_other_terms_may_not_use_a_learned_term(tmp_path):
    errors = errors_of(tmp_path, "SELECT CAPPED(amount, 0.1, 0.9) AS capped_amount,\n"
                                 "  capped_amount * 2 AS doubled FROM orders\n")
    assert errors == ["terms/learned.sql:2:3: term 'capped_amount' is a learned term (CAPPED); other terms may not "
                      "use it: use its argument expression instead"]


# --- fit and score on a generated project --------------------------------------------------------

LEASES_YAML = """\
name: leases
engine:
  kind: duckdb
  path: build/leases.duckdb
inputs:
  leases:
    key: lease_id
    load: data/leases.csv
    columns:
      lease_id: BIGINT
      sector: VARCHAR
      branch: BIGINT
      income: DOUBLE
      defaulted: BIGINT
"""
SECTORS = {"retail": 0.0, "construction": 0.6, "transport": 0.3, "farming": -0.4, "mining": 0.8, "fishing": 0.2}
SHARES = [0.4, 0.25, 0.2, 0.1, 0.03, 0.02]  # mining and fishing are rare: pooled into `other`


def lease_rows(n: int = 1500, seed: int = 7):
    """Invented leases: sector, branch number, income, and a default drawn from a known logistic model."""
    rng = np.random.default_rng(seed)
    sector = rng.choice(list(SECTORS), size=n, p=SHARES)
    branch = rng.integers(1, 4, size=n)
    income = np.round(rng.lognormal(3.0, 0.6, size=n), 2)
    eta = -1.0 + np.array([SECTORS[s] for s in sector]) + 0.02 * (income - 20) - 0.0004 * (income - 20) ** 2
    defaulted = (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(int)
    return {"lease_id": np.arange(1, n + 1), "sector": sector, "branch": branch, "income": income, "defaulted": defaulted}


def lease_project(root, terms: str, spec_terms: list[str], rows=None):
    data = rows or lease_rows()
    lines = ["lease_id,sector,branch,income,defaulted"]
    lines += [f"{i},{s},{b},{float(x)!r},{y}" for i, s, b, x, y in zip(*data.values())]
    write_project(root, {"featpipe.yaml": LEASES_YAML, "data/orders.csv": None, "data/leases.csv": "\n".join(lines) + "\n",
                         "terms/basket.sql": None, "specs/returns.yaml": None, "terms/lease.sql": terms,
                         "specs/risk.yaml": f"input: leases\ntarget: defaulted\nfamily: binomial\nterms: [{', '.join(spec_terms)}]\n"
                                            "holdout: {fraction: 0.25, salt: s1}\n"})
    return root, data


def fit_and_frame(root, data):
    """Fit the model; the fitted model and the training rows as a pandas frame (read from the design table)."""
    project = load_project(root)
    api.fit(project)
    fitted = read_fitted(project.fitted_path("risk"))
    with connect(project) as engine:
        holdout = dict(engine.fetch(exp.select('"lease_id"', '"_holdout"').from_("design_risk")))
    frame = pd.DataFrame(data)
    frame = frame[~frame["lease_id"].map(holdout)].reset_index(drop=True)
    return project, fitted, frame


def test_levels_fit_equals_statsmodels_treatment_coding_with_pooled_levels(tmp_path):
    root, data = lease_project(tmp_path, "SELECT LEVELS(sector, 40) AS sector_level FROM leases\n",
                               ["sector_level", "income"])
    project, fitted, frame = fit_and_frame(root, data)
    learned = fitted.term("sector_level").learned
    counts = frame["sector"].value_counts()
    assert learned["reference"] == counts.index[0] == "retail"
    assert {item["level"]: item["rows"] for item in learned["levels"]} == counts.to_dict()
    # Levels below 40 training rows pool into `other` (mining and fishing together hold more than 40).
    pooled = sorted(counts[counts < 40].index)
    assert sorted(learned["pooled"]) == pooled and len(pooled) == 2
    # Reference: statsmodels' formula API, treatment coding against the most frequent level, on the same
    # training rows with the pooled levels recoded to `other`.
    frame["recoded"] = frame["sector"].where(~frame["sector"].isin(pooled), "other")
    reference = smf.glm("defaulted ~ C(recoded, Treatment(reference='retail')) + income", frame,
                        family=sm.families.Binomial()).fit()
    for item in learned["columns"]:
        name = f"C(recoded, Treatment(reference='retail'))[T.{item['label']}]"
        assert item["estimate"] == pytest.approx(reference.params[name], rel=1e-9, abs=1e-9)
        assert item["std_error"] == pytest.approx(reference.bse[name], rel=1e-6)
    assert fitted.term("income").estimate == pytest.approx(reference.params["income"], rel=1e-9)
    # The joint Wald test of the term: statsmodels' wald_test of every sector column at once.
    columns = [n for n in reference.params.index if n.startswith("C(")]
    joint = reference.wald_test(" , ".join(f"{c} = 0" for c in columns).replace("[", "[").replace("'", "'"),
                                scalar=True)
    assert learned["wald"]["statistic"] == pytest.approx(float(joint.statistic), rel=1e-6)
    assert learned["wald"]["df"] == len(columns)
    construction = next(item for item in learned["columns"] if item["label"] == "construction")
    assert construction["reading"].startswith("construction vs retail (reference): odds ratio ")
