"""Column names match whatever their case, quoted or not (term files are DuckDB SQL, where identifiers
are case-insensitive); the generated SQL quotes each column as declared.

Warehouses that upper-case every name make this the common case. The check runs on the Longley
data statsmodels ships (upper-case columns), fitted through featpipe end to end and compared with the
NIST StRD certified values for Longley.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from conftest import write_project

from featpipe import api
from featpipe.errors import FeatpipeError
from featpipe.project import load_project

COLUMNS = ["TOTEMP", "GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]
PROJECT = """\
name: longley
engine: {kind: duckdb, path: build/longley.duckdb}
inputs:
  longley:
    key: ROW_ID
    load: data/longley.csv
    columns:
      ROW_ID: BIGINT
""" + "".join(f"      {name}: DOUBLE\n" for name in COLUMNS)
# Each regressor written another way: lower case, mixed case, quoted as declared, qualified, listed directly.
TERMS = """\
SELECT
  gnpdefl AS deflator,
  Gnp AS gnp_total,
  "UNEMP" AS unemployed,
  longley.armed AS armed_forces
FROM longley
"""
SPEC = """\
input: longley
target: TOTEMP
family: gaussian
terms: [deflator, gnp_total, unemployed, armed_forces, POP, YEAR]
holdout: {fraction: 0}
"""


def longley_project(root, terms: str = TERMS):
    data = sm.datasets.longley.load_pandas().data
    lines = [",".join(["ROW_ID", *COLUMNS])]
    lines += [",".join([str(index + 1), *(repr(float(row[name])) for name in COLUMNS)]) for index, row in data.iterrows()]
    return write_project(root, {"featpipe.yaml": PROJECT, "data/longley.csv": "\n".join(lines) + "\n",
                                "terms/economy.sql": terms, "specs/employment.yaml": SPEC,
                                "data/orders.csv": None, "terms/basket.sql": None, "specs/returns.yaml": None})


def test_upper_case_columns_resolve_and_the_fit_matches_the_nist_certified_values(tmp_path):
    root = longley_project(tmp_path / "longley")
    terms = api.check(load_project(root)).terms
    assert terms["deflator"].sql == '"GNPDEFL"' and terms["armed_forces"].sql == '"ARMED"'
    (outcome,) = api.fit(load_project(root))
    fitted = outcome.fitted
    # NIST StRD Longley certified values (recalled from memory; they agree digit for digit with the NIST
    # values statsmodels ships in statsmodels/regression/tests/results/results_regression.py).
    certified = [-3482258.63459582, 15.0618722713733, -0.358191792925910e-01, -2.02022980381683,
                 -1.03322686717359, -0.511041056535807e-01, 1829.15146461355]
    certified_se = [890420.383607373, 84.9149257747669, 0.334910077722432e-01, 0.488399681651699,
                    0.214274163161675, 0.226073200069370, 455.478499142212]
    # The fitted file keeps 12 significant digits; the certified values have 15.
    np.testing.assert_allclose([term.estimate for term in fitted.terms], certified, rtol=1e-8)
    np.testing.assert_allclose([term.std_error for term in fitted.terms], certified_se, rtol=1e-8)
    assert math.sqrt(fitted.fit["dispersion"]) == pytest.approx(304.854073561965, rel=1e-9)


@pytest.mark.parametrize(("written", "message"), [
    ("SELECT GNP AS gnp FROM longley",
     "terms/economy.sql:1:15: term name 'gnp' is already a column of input 'longley'; choose another name"),
    ("SELECT gnp_deflator AS deflator FROM longley",
     "terms/economy.sql:1:8: unknown name 'gnp_deflator': not a column of input 'longley' nor a term; "
     "did you mean 'deflator'?"),
])
def test_a_term_may_not_take_a_columns_name_in_any_case(tmp_path, written, message):
    root = longley_project(tmp_path / "longley", terms=written)
    (root / "specs" / "employment.yaml").write_text(SPEC.replace("terms: [deflator, gnp_total, unemployed, armed_forces, POP, YEAR]", "terms: [POP]"))
    with pytest.raises(FeatpipeError) as caught:
        api.check(load_project(root))
    assert [str(d) for d in caught.value.diagnostics] == [message]


def test_an_offset_reads_upper_case_columns_too(tmp_path):
    root = longley_project(tmp_path / "longley")
    spec = root / "specs" / "employment.yaml"
    spec.write_text(SPEC.replace("terms: [deflator, gnp_total, unemployed, armed_forces, POP, YEAR]",
                                 "terms: [deflator, gnp_total]\noffset: LN(pop)"))
    model = api.check(load_project(root)).models["employment"]
    assert model.offset_sql == 'LN("POP")'
