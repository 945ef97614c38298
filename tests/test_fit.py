"""`featpipe fit` on the demo projects, end to end: the fitted file against statsmodels, determinism,
atomic failure, staleness, explain and refresh."""

from __future__ import annotations

import contextlib
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import copy_demo
from recording import Recording

import featpipe
from featpipe import api
from featpipe.engines.statements import select_all
from featpipe.errors import FeatpipeError
from featpipe.fitted import read_fitted
from featpipe.fitted.explain import explain
from featpipe.fitting.inputs import input_profiles
from featpipe.fitting.metrics import training_profiles
from featpipe.project.names import LINEAR_PREDICTOR
from featpipe.project import load_project
from featpipe.sqlgen.common import column, training_rows
from featpipe.sqlgen.metrics import linear_predictor

FAMILIES = {"binomial": sm.families.Binomial(), "poisson": sm.families.Poisson(), "gamma": sm.families.Gamma(sm.families.links.Log())}


@pytest.fixture(scope="module")
def fitted_demos(tmp_path_factory):
    root = tmp_path_factory.mktemp("fits")
    projects = {name: featpipe.load_project(copy_demo(name, root)) for name in ("lease_default", "fleet_claims")}
    for project in projects.values():
        api.fit(project)
    return projects


@pytest.mark.parametrize("demo, model", [("lease_default", "default_risk"), ("lease_default", "default_raw"),
                                         ("fleet_claims", "claim_frequency"), ("fleet_claims", "claim_severity")])
def test_the_fitted_file_agrees_with_statsmodels_on_the_same_rows(fitted_demos, demo, model):
    project = fitted_demos[demo]
    fitted = read_fitted(project.fitted_path(model))
    layout = api.check(project).models[model].layout
    # A learned term is fitted on its design columns, in the table the fit expands them into.
    if any(t.learned for t in fitted.terms):
        names = [name for t in fitted.model_terms
                 for name in ([f"_{t.name}__{i}" for i in range(1, len(t.learned["columns"]) + 1)]
                              if t.learned else [t.name])]
        layout = replace(layout, table=f"{layout.table}__columns", terms=tuple(names))
    with api.connect(project) as engine:
        rows = engine.fetch_frame(select_all(layout.table).where(training_rows(layout))).sort_values(layout.key)
    design = sm.add_constant(rows[list(layout.terms)].to_numpy(float), has_constant="add")
    offset = rows[layout.offset].to_numpy(float) if layout.offset else None
    # Reference library: statsmodels GLM, the same rows and terms, IRLS run to a tight tolerance (its
    # default 1e-8 leaves p-values about 4e-5 off the converged values on these data).
    reference = sm.GLM(rows[layout.target].to_numpy(float), design, family=FAMILIES[fitted.family],
                       offset=offset).fit(tol=1e-13, use_t=fitted.fit["statistic"] == "t")
    assert fitted.rows["train"] == len(rows)
    coefficients = [item for t in fitted.terms
                    for item in (t.learned["columns"] if t.learned and t.estimate is None else [vars(t)])]
    np.testing.assert_allclose([c["estimate"] for c in coefficients], reference.params, rtol=1e-6)
    np.testing.assert_allclose([c["std_error"] for c in coefficients], reference.bse, rtol=1e-6)
    np.testing.assert_allclose([c["p_value"] for c in coefficients], reference.pvalues, rtol=1e-5)
    assert fitted.fit["deviance"] == pytest.approx(reference.deviance, rel=1e-9)
    assert fitted.fit["null_deviance"] == pytest.approx(reference.null_deviance, rel=1e-9)
    assert fitted.fit["aic"] == pytest.approx(reference.aic, rel=1e-9)
    low, high = reference.conf_int().T
    np.testing.assert_allclose([c["ci_low"] for c in coefficients], low, rtol=1e-6)
    np.testing.assert_allclose([c["ci_high"] for c in coefficients], high, rtol=1e-6)


def test_the_same_definitions_and_data_give_a_byte_identical_file(fitted_demos):
    project = fitted_demos["lease_default"]
    path = project.fitted_path("default_risk")
    before = path.read_bytes()
    (outcome,) = api.fit(project, ["default_risk"])
    assert not outcome.changed and path.read_bytes() == before


def test_every_term_carries_fingerprint_sql_effect_and_notes(fitted_demos):
    fitted = read_fitted(fitted_demos["lease_default"].fitted_path("default_risk"))
    ratio = fitted.term("payment_to_revenue")
    assert ratio.sql == '"monthly_payment" / NULLIF("monthly_revenue", 0)'
    assert ratio.effect.kind == "odds ratio" and ratio.effect.step == 0.1
    assert ratio.effect.value == pytest.approx(np.exp(0.1 * ratio.estimate), rel=1e-11)
    assert ratio.notes[0] == "Underwriting guidance treats a payment above 15% of revenue as stretched."
    assert any(note.startswith("each increase of 0.1 in payment to revenue multiplies the odds") for note in ratio.notes)
    assert any("read together with" in note and "young_and_stretched" in note for note in ratio.notes)
    assert fitted.rows["dropped"] == {"null term payment_to_revenue": 58, "null term young_and_stretched": 58,
                                      "null term log_revenue": 58}
    assert fitted.metrics["rows"] == fitted.rows["holdout"]


def test_a_failed_fit_leaves_the_previous_file(fitted_demos, tmp_path):
    project_root = copy_demo("lease_default", tmp_path)
    api.fit(featpipe.load_project(project_root), ["default_risk"])
    path = project_root / "fitted" / "default_risk.yaml"
    before = path.read_bytes()
    spec = project_root / "specs" / "default_risk.yaml"
    spec.write_text(spec.read_text().replace("max_dropped: 0.03", "max_dropped: 0.001"))
    with pytest.raises(FeatpipeError, match=r"58 of 5000 rows \(1.2%\) have a NULL .* more than max_dropped 0.001"):
        api.fit(featpipe.load_project(project_root), ["default_risk"])
    assert path.read_bytes() == before


def test_an_edited_term_makes_the_fit_stale_and_refresh_refits(tmp_path):
    root = copy_demo("fleet_claims", tmp_path)
    project = featpipe.load_project(root)
    assert [o.model for o in api.refresh(project)] == ["claim_frequency", "claim_severity"]
    assert api.refresh(project) == []  # everything is up to date
    usage = root / "terms" / "usage.sql"
    usage.write_text(usage.read_text().replace("/ 1000.0", "/ 100.0"))
    project = featpipe.load_project(root)
    assert api.check_report(project).stale == ("fitted/claim_frequency.yaml is stale: term 'km_per_driver' changed meaning",)
    assert [o.model for o in api.refresh(project)] == ["claim_frequency"]
    assert api.check_report(featpipe.load_project(root)).stale == ()


def test_explain_a_term_and_a_model(fitted_demos):
    compiled = api.check(fitted_demos["lease_default"])
    term = explain(compiled, "payment_to_revenue")
    assert term["where"] == "terms/affordability.sql:5:51"
    assert [use["model"] for use in term["models"]] == ["default_risk"]
    assert term["models"][0]["fitted"]["estimate"] > 0 and term["models"][0]["stale"] == []
    model = explain(compiled, "default_raw")
    assert model["fitted"]["family"] == "binomial"
    with pytest.raises(FeatpipeError, match="did you mean 'payment_to_revenue'"):
        explain(compiled, "payment_to_revenu")


def test_a_missing_input_is_dropped_through_least_and_counted_when_a_term_fills_it_in(tmp_path):
    """LEAST keeps a missing revenue missing (the row is dropped, not capped); a CASE that reads a
    missing revenue as 'not high' fills it in, and the fitted file counts those rows per term."""
    root = copy_demo("lease_default", tmp_path)
    (root / "terms" / "revenue.sql").write_text(
        "SELECT\n"
        "  LEAST(monthly_revenue, 50000) AS revenue_capped,\n"
        "  CASE WHEN monthly_revenue > 20000 THEN 1 ELSE 0 END AS high_revenue\n"
        "FROM leases\n")
    (root / "specs" / "revenue.yaml").write_text(
        "input: leases\ntarget: defaulted_12m\nfamily: binomial\n"
        "terms: [revenue_capped, high_revenue, firm_age_years]\n")
    (outcome,) = api.fit(load_project(root), ["revenue"])

    # Reference: pandas' count of leases whose monthly revenue is missing in the demo data.
    missing = int(pd.read_csv(root / "data" / "leases.csv")["monthly_revenue"].isna().sum())
    assert missing > 0
    assert outcome.fitted.rows["dropped"] == {"null term revenue_capped": missing}
    assert outcome.fitted.rows["imputed"] == {"high_revenue": missing}


def test_a_fit_reads_what_needs_no_coefficients_on_a_second_connection_beside_the_fit(postgres_engine, tmp_path, monkeypatch):
    """The term profiles and the input's health do not depend on the coefficients, so a fit on PostgreSQL
    reads them on a second connection while it fits (featpipe.fitting.beside), then the linear
    predictor's profile there while it measures the holdout: the very queries, in that order, that
    read them in turn, and the fitted file holds what they read."""
    from featpipe.engines.postgres import PostgresEngine

    twins = []
    beside = PostgresEngine.beside

    @contextlib.contextmanager
    def recorded(self):
        with beside(self) as twin:
            twins.append(Recording(twin))
            yield twins[-1]

    monkeypatch.setattr(PostgresEngine, "beside", recorded)
    monkeypatch.setenv("FEATPIPE_TEST_DSN", postgres_engine.dsn)
    root = copy_demo("lease_default", tmp_path)
    settings = (root / "featpipe.yaml").read_text(encoding="utf-8")
    (root / "featpipe.yaml").write_text(settings.replace("  kind: duckdb\n  path: build/lease_default.duckdb\n",
                                                         "  kind: postgres\n  dsn: ${FEATPIPE_TEST_DSN}\n"), encoding="utf-8")
    project = featpipe.load_project(root)
    api.fit(project, ["default_raw"])
    fitted = read_fitted(project.fitted_path("default_raw"))
    model = api.check(project).models["default_raw"]
    layout, declared = model.layout, project.inputs["leases"].columns
    with api.connect(project) as engine:
        in_turn = Recording(engine)
        profiles = training_profiles(in_turn, layout, {name: column(name) for name in layout.terms})
        health = input_profiles(in_turn, "leases", layout.key, model.spec.holdout,
                                {name: declared[name] for name in sorted({c for t in model.terms for c in t.columns})})
        coefficients = {term.name: term.estimate for term in fitted.terms}
        training_profiles(in_turn, layout, {LINEAR_PREDICTOR: linear_predictor(layout, coefficients)})
    (twin,) = twins
    assert twin.queries == in_turn.queries
    assert fitted.input_profiles == health
    for term in fitted.model_terms:  # order statistics are written in full, figures from sums to 12 digits
        found, expected = term.profile, profiles[term.name]
        assert (found.count, found.nulls, found.min, found.median, found.max, found.edges) == (
            expected.count, expected.nulls, expected.min, expected.median, expected.max, expected.edges)
        assert (found.mean, found.sd, *found.shares) == pytest.approx((expected.mean, expected.sd, *expected.shares), rel=1e-11)
