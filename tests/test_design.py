"""Design tables: built in DuckDB, equal to an independent pandas computation, the same on SQLite,
and rendered for every dialect."""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
import pytest
import sqlglot
from conftest import DEMOS, copy_demo, write_project
from sqlite_engine import SQLiteEngine

import featpipe
from featpipe.api import DIALECTS
from featpipe.engines.statements import select_all
from featpipe.errors import FeatpipeError
from featpipe.sqlgen.common import render
from featpipe.sqlgen.design import design_query, terms_query


def lease_terms_in_pandas(leases: pd.DataFrame) -> pd.DataFrame:
    """The demo's lease terms written again by hand in pandas, as an independent check of the SQL."""
    revenue = leases.monthly_revenue.where(leases.monthly_revenue != 0)
    ratio = leases.monthly_payment / revenue
    young = (leases.firm_age_years < 2).astype(float)
    return pd.DataFrame({
        "lease_id": leases.lease_id,
        "defaulted_12m": leases.defaulted_12m.astype(float),
        # The split: MD5 of "salt:key" (Python's hashlib), first 8 hex digits below 0.3 * 16**8.
        "_holdout": [hashlib.md5(f"v1:{key}".encode()).hexdigest()[:8] < format(round(0.3 * 16**8), "08x")
                     for key in leases.lease_id],
        "payment_to_revenue": ratio,
        "young_firm": young,
        "young_and_stretched": ratio * young,
        "firm_age_years": leases.firm_age_years.astype(float),
        "log_revenue": np.log(leases.monthly_revenue.where(leases.monthly_revenue > 0)),
        "monthly_payment": leases.monthly_payment.astype(float),
        "past_late_payments": leases.past_late_payments.astype(float),
        "term_months": leases.term_months.astype(float),
        "sector_level": leases.sector,  # a learned term (LEVELS): the design table keeps its level as text
    })


@pytest.fixture(scope="module")
def lease_demo(tmp_path_factory):
    root = copy_demo("lease_default", tmp_path_factory.mktemp("demo"))
    project = featpipe.load_project(root)
    featpipe.compute(project)
    return project


def test_the_design_table_equals_the_terms_computed_in_pandas(lease_demo):
    with featpipe.connect(lease_demo) as engine:
        built = engine.fetch_frame(select_all("design_default_risk")).sort_values("lease_id").reset_index(drop=True)
    expected = lease_terms_in_pandas(pd.read_csv(DEMOS / "lease_default" / "data" / "leases.csv"))
    assert list(built.columns) == list(expected.columns)
    assert built._holdout.tolist() == expected._holdout.tolist()
    assert built.sector_level.tolist() == expected.sector_level.tolist()
    numeric = expected.columns.drop(["_holdout", "sector_level"])
    # NULL exactly where pandas has NaN, and equal values elsewhere (to 1e-12 relative).
    assert (built[numeric].isna() == expected[numeric].isna()).all().all()
    np.testing.assert_allclose(built[numeric].to_numpy(float), expected[numeric].to_numpy(float), rtol=1e-12, equal_nan=True)
    assert built.payment_to_revenue.isna().sum() == 58  # 50 missing and 8 zero revenues in the demo data
    assert 0.27 < built._holdout.mean() < 0.33


def test_sqlite_computes_the_same_design_table_as_duckdb(lease_demo):
    compiled = featpipe.check(lease_demo)
    model = compiled.models["default_risk"]
    source = lease_demo.inputs["leases"]
    sqlite = SQLiteEngine()
    sqlite.load_file("leases", source.load)
    sqlite.create_table("design_default_risk", design_query(model, source))
    on_sqlite = sqlite.fetch_frame(select_all("design_default_risk")).sort_values("lease_id").reset_index(drop=True)
    with featpipe.connect(lease_demo) as engine:
        on_duckdb = engine.fetch_frame(select_all("design_default_risk")).sort_values("lease_id").reset_index(drop=True)
    assert on_sqlite._holdout.astype(bool).tolist() == on_duckdb._holdout.tolist()
    assert on_sqlite.sector_level.tolist() == on_duckdb.sector_level.tolist()  # a learned term's level, as text
    columns = on_duckdb.columns.drop(["_holdout", "sector_level"])
    np.testing.assert_allclose(on_sqlite[columns].to_numpy(float), on_duckdb[columns].to_numpy(float), rtol=1e-12, equal_nan=True)


@pytest.mark.parametrize("dialect", DIALECTS)
@pytest.mark.parametrize("demo", ["lease_default", "fleet_claims"])
def test_every_term_and_design_query_parses_back_in_every_dialect(demo, dialect):
    project = featpipe.load_project(DEMOS / demo)
    compiled = featpipe.check(project)
    for model in compiled.models.values():
        source = project.inputs[model.spec.input]
        for query in (design_query(model, source), terms_query(list(model.terms), source)):
            text = render(query, dialect)
            reparsed = sqlglot.parse_one(text, read=dialect)
            assert render(reparsed, dialect) == text


def test_a_contract_mismatch_builds_nothing(tmp_path):
    root = write_project(tmp_path, {"data/orders.csv": "order_id,amount,items,region,returned\n1,abc,2,north,0\n"})
    with pytest.raises(FeatpipeError) as caught:
        featpipe.compute(featpipe.load_project(root))
    assert "column 'amount' is declared DOUBLE (floating point) but file data/orders.csv has" in str(caught.value)
    with featpipe.connect(featpipe.load_project(root)) as engine:
        assert engine.describe("design_returns") is None


def test_a_failed_rebuild_keeps_the_previous_design_table(project_dir):
    featpipe.compute(featpipe.load_project(project_dir))
    (project_dir / "data" / "orders.csv").write_text("order_id,amount\n1,2.0\n")  # most columns gone
    with pytest.raises(FeatpipeError, match="column 'items' \\(BIGINT\\) is missing"):
        featpipe.compute(featpipe.load_project(project_dir))
    with featpipe.connect(featpipe.load_project(project_dir)) as engine:
        assert len(engine.fetch(select_all("design_returns"))) == 8
