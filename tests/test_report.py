"""The model report on the demo projects: content, self-containment, and its numbers against references.

The demo projects are copied, fitted and reported once per module. Checks:
- every term's SQL, doc, fingerprint and notes appear as in the fitted file, every metric as the
  report's own formatter prints the fitted file's value, and every figure as inline <svg>;
- nothing in the page refers to a network address;
- the effect curves equal the scoring SQL run by DuckDB over the same grid built independently here
  (pandas into an in-memory DuckDB), and for the raw-inputs model also plain numpy arithmetic on the
  fitted coefficients; the held values equal pandas medians of the fit's training rows;
- the likelihood-ratio statistic equals twice the difference of the two fits' log-likelihoods and
  statsmodels' (reference library) GLM fits of both models on the same design-table rows; its p-value
  equals scipy's chi-squared tail at statsmodels' statistic and degrees of freedom (statsmodels'
  GLM results offer no compare_lr_test; only its linear-regression results do).
"""

from __future__ import annotations

import dataclasses
import html
import json
import math
import re

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import copy_demo
from delong_reference import delong_reference
from scipy.stats import chi2, norm

from featpipe import api
from featpipe.compiler import dependencies_fingerprint
from featpipe.errors import FeatpipeError
from featpipe.fitted import read_fitted, write_fitted
from featpipe.fitted.report import report_path, write_report
from featpipe.fitted.report import readings
from featpipe.fitted.report.compare import compare, likelihood_ratio
from featpipe.fitted.report.data import default_pair, gather, term_inputs
from featpipe.fitted.report.render import CURVES_ID, metric_text
from featpipe.fitted.scoring import scoring_model
from featpipe.sqlgen.score import score_query

FORBIDDEN = ("http://", "https://", "//cdn", "<script src", "<link", "xlink:", "<?xml", "<!--")


@pytest.fixture(scope="module")
def demos(tmp_path_factory):
    """Both demo projects copied, fitted, and reported: the lease pair compared, the claim model alone."""
    root = tmp_path_factory.mktemp("report")
    lease = api.load_project(copy_demo("lease_default", root))
    fleet = api.load_project(copy_demo("fleet_claims", root))
    api.fit(lease)
    api.fit(fleet)
    return {
        "lease": lease,
        "fleet": fleet,
        "compared": write_report(lease, "default_risk", against="default_raw"),
        "claims": write_report(fleet, "claim_frequency"),
    }


def page(path) -> str:
    return path.read_text(encoding="utf-8")


def text_of(markup: str) -> str:
    """The page's text: tags removed, entities decoded (the SQL is highlighted, so split into spans)."""
    return html.unescape(re.sub(r"<[^>]+>", "", markup))


def curves_of(markup: str) -> dict:
    found = re.search(rf'<script type="application/json" id="{CURVES_ID}">(.*?)</script>', markup, re.S)
    return json.loads(found.group(1))


def cells(markup: str, attribute: str, model: str | None = None) -> dict[str, str]:
    """Table cells carrying data-<attribute>="key" (and data-model when given): key -> printed text."""
    owner = f' data-model="{model}"' if model else ""
    pattern = rf'<td class="num" data-{attribute}="([^"]+)"{owner}>([^<]*)</td>'
    return dict(re.findall(pattern, markup))


def training_frame(project, model: str) -> pd.DataFrame:
    """The fit's training rows of the design table, joined to the raw input columns (read by pandas)."""
    fitted = read_fitted(project.fitted_path(model))
    connection = duckdb.connect(str(project.engine.path), read_only=True)
    try:
        design = connection.execute(f'SELECT * FROM "design_{model}"').df()
    finally:
        connection.close()
    names = [fitted.target] + [term.name for term in fitted.terms[1:]] + (["_offset"] if fitted.offset else [])
    rows = design[~design["_holdout"].astype(bool) & design[names].notna().all(axis=1)]
    raw = pd.read_csv(project.inputs[fitted.input].load)
    return rows[[fitted.key]].merge(raw, on=fitted.key, how="left")


def independent_grid(project, fitted, curves: dict) -> pd.DataFrame:
    """Every curve's grid points as rows of the input's contract, built here from the page's numbers."""
    source = project.inputs[fitted.input]
    held = curves["held"]
    rows, key = [], 0
    for curve in curves["curves"]:
        for value in curve["x"]:
            row = {name: held.get(name) for name in source.columns}
            row[source.key] = key
            row[curve["column"]] = value
            rows.append(row)
            key += 1
    dtypes = {"BIGINT": "Int64", "DOUBLE": "Float64", "VARCHAR": "string"}
    return pd.DataFrame(rows, columns=list(source.columns)).astype({n: dtypes[t] for n, t in source.columns.items()})


def scored_by_duckdb(fitted, grid: pd.DataFrame) -> np.ndarray:
    connection = duckdb.connect()
    try:
        connection.register("grid_frame", grid)
        connection.execute("CREATE TABLE grid AS SELECT * FROM grid_frame")
        scored = connection.execute(score_query(scoring_model(fitted), table="grid").sql(dialect="duckdb", identify=True)).df()
    finally:
        connection.close()
    return scored.sort_values(fitted.key)["prediction"].to_numpy(dtype=float)


# --- content ------------------------------------------------------------------------------------


@pytest.mark.parametrize("report, project, models", [
    ("compared", "lease", ["default_risk", "default_raw"]),
    ("claims", "fleet", ["claim_frequency"]),
])
def test_every_term_with_its_sql_doc_fingerprint_and_notes_is_in_the_report(demos, report, project, models):
    text = text_of(page(demos[report]))
    fitted = read_fitted(demos[project].fitted_path(models[0]))
    for term in fitted.terms[1:]:
        assert f"{term.name} {term.kind}" in text
        assert term.sql in text, term.name
        assert term.fingerprint in text
        assert term.doc in text
        for note in term.notes:
            assert note in text, note
    if fitted.offset:
        assert fitted.offset in text


def test_metric_values_are_the_fitted_files_as_the_report_formats_them(demos):
    markup = page(demos["compared"])
    risk = read_fitted(demos["lease"].fitted_path("default_risk"))
    raw = read_fitted(demos["lease"].fitted_path("default_raw"))
    keys = ["accuracy", "baseline_accuracy", "precision", "recall", "auc", "auc_low", "auc_high", "gini", "ks",
            "ks_score", "log_loss", "brier", "calibration_intercept", "calibration_slope"]
    model_table = markup.split('id="holdout-metrics"')[1].split("</table>")[0]
    assert cells(model_table, "metric") == {key: metric_text(risk.metrics[key]) for key in keys}
    for fitted in (risk, raw):
        assert cells(markup, "metric", fitted.model) == {**{key: metric_text(fitted.metrics[key]) for key in keys},
                                                         "threshold": metric_text(fitted.threshold)}
        shown = cells(markup, "fit", fitted.model)
        for key in ("log_likelihood", "deviance", "null_deviance", "aic", "bic"):
            assert shown[key] == metric_text(fitted.fit[key])
        assert shown["train"] == metric_text(fitted.rows["train"])
    assert metric_text(0.8017640508703041) == "0.8018" and metric_text(1873.189662245814) == "1,873.19"

    claims = read_fitted(demos["fleet"].fitted_path("claim_frequency"))
    keys = ["deviance", "mean_absolute_error", "rmse", "mean_observed", "mean_predicted", "calibration_intercept",
            "calibration_slope"]
    assert cells(page(demos["claims"]), "metric") == {key: metric_text(claims.metrics[key]) for key in keys}


@pytest.mark.parametrize("report, project, models, performance", [
    ("compared", "lease", ["default_risk", "default_raw"], 3),  # calibration, ROC, score distribution
    ("claims", "fleet", ["claim_frequency"], 2),  # observed against predicted, residuals
])
def test_every_plot_is_inline_svg(demos, report, project, models, performance):
    markup = page(demos[report])
    read = {name for model in models for name in term_inputs(read_fitted(demos[project].fitted_path(model)))}
    inputs = len(curves_of(markup)["curves"])
    assert inputs == len(read)
    figures = re.findall(r"<figure[^>]*>\s*<svg[^>]*>", markup)
    learned = [t.name for t in read_fitted(demos[project].fitted_path(models[0])).model_terms if t.learned]
    assert len(learned) == 1 and markup.count("data-learned=") == len(learned)
    # the interval plot, one curve per input, the decision surface, the holdout figures, and one figure
    # per learned term (sector_level, vehicle_age_curve)
    assert len(figures) == 1 + inputs + 1 + performance + len(learned)
    assert markup.count("<svg") == len(figures) and markup.count("</svg>") == len(figures)
    assert "<img" not in markup


@pytest.mark.parametrize("report", ["compared", "claims"])
def test_the_page_refers_to_no_network_address(demos, report):
    markup = page(demos[report])
    for forbidden in FORBIDDEN:
        assert forbidden not in markup, forbidden
    assert "<script" not in markup.replace(f'<script type="application/json" id="{CURVES_ID}">', "")


def test_sections_come_in_order_each_with_a_reading(demos):
    markup = page(demos["compared"])
    order = ["model", "comparison", "coefficients", "terms", "effect-curves-section", "decision-surface", "performance", "cautions"]
    positions = [markup.index(f'<section id="{name}">') for name in order]
    assert positions == sorted(positions)
    for section in re.findall(r"<section id=[^>]*>(.*?)</section>", markup, re.S):
        assert re.search(r'<p class="reading">[^<]{40,}</p>', section)
    text = text_of(markup)
    assert "Protected characteristics and proxies need review." in text
    assert "Local law and model-risk policy govern use." in text


def test_the_report_is_written_at_its_default_place_and_leaves_no_temporary_table(demos):
    lease = demos["lease"]
    assert demos["compared"] == report_path(lease, "default_risk", "default_raw")
    assert demos["compared"].parent == lease.root / "build" / "reports"
    assert [p.name for p in demos["compared"].parent.iterdir() if p.name.startswith(".")] == []
    connection = duckdb.connect(str(lease.engine.path), read_only=True)
    try:
        tables = [name for (name,) in connection.execute("SELECT table_name FROM information_schema.tables").fetchall()]
    finally:
        connection.close()
    assert [name for name in tables if name.startswith("featpipe_report")] == []


# --- numbers against references -------------------------------------------------------------


@pytest.mark.parametrize("report, project", [("compared", "lease"), ("claims", "fleet")])
def test_effect_curves_equal_the_scoring_sql_on_the_same_grid(demos, report, project):
    curves = curves_of(page(demos[report]))
    for model in curves["models"]:
        fitted = read_fitted(demos[project].fitted_path(model))
        expected = scored_by_duckdb(fitted, independent_grid(demos[project], fitted, curves))
        shown = np.array([p for curve in curves["curves"] for p in curve["predictions"][model]], dtype=float)
        assert len(shown) == len(expected)
        np.testing.assert_allclose(shown, expected, rtol=1e-12, atol=1e-12)


def test_raw_model_curves_equal_numpy_arithmetic_on_its_coefficients(demos):
    """default_raw's terms are the raw inputs and LN(revenue): its curve is the logistic of a sum (numpy)."""
    curves = curves_of(page(demos["compared"]))
    raw = read_fitted(demos["lease"].fitted_path("default_raw"))
    b = raw.coefficients
    for curve in curves["curves"]:
        if curve["kind"] == "levels":
            continue
        inputs = {name: np.full(len(curve["x"]), float(value)) for name, value in curves["held"].items()
                  if not isinstance(value, str)}
        inputs[curve["column"]] = np.array(curve["x"], dtype=float)
        eta = (b["(intercept)"] + b["firm_age_years"] * inputs["firm_age_years"]
               + b["log_revenue"] * np.log(inputs["monthly_revenue"]) + b["monthly_payment"] * inputs["monthly_payment"]
               + b["past_late_payments"] * inputs["past_late_payments"] + b["term_months"] * inputs["term_months"])
        np.testing.assert_allclose(curve["predictions"]["default_raw"], 1 / (1 + np.exp(-eta)), rtol=1e-12)


@pytest.mark.parametrize("project, model", [("lease", "default_risk"), ("fleet", "claim_frequency")])
def test_held_values_and_grid_ends_are_pandas_medians_and_percentiles_of_the_training_rows(demos, project, model):
    report = "compared" if project == "lease" else "claims"
    curves = curves_of(page(demos[report]))
    rows = training_frame(demos[project], model)
    assert len(rows) == read_fitted(demos[project].fitted_path(model)).rows["train"]
    types = demos[project].inputs[read_fitted(demos[project].fitted_path(model)).input].columns
    for name, held in curves["held"].items():
        if types[name] == "VARCHAR":
            counts = rows[name].value_counts()
            assert held == sorted(counts[counts == counts.max()].index)[0]
        elif types[name] == "BIGINT":
            assert held == math.floor(rows[name].median() + 0.5)
        else:
            assert held == pytest.approx(rows[name].median(), rel=1e-12)
    for curve in curves["curves"]:
        if types[curve["column"]] == "DOUBLE":
            # numpy's default (linear) percentile is PERCENTILE_CONT's rule
            low, high = np.percentile(rows[curve["column"]].dropna(), [1, 99])
            assert curve["x"][0] == pytest.approx(low, rel=1e-12) and curve["x"][-1] == pytest.approx(high, rel=1e-12)


def test_likelihood_ratio_equals_twice_the_log_likelihood_difference_and_statsmodels(demos):
    lease = demos["lease"]
    markup = page(demos["compared"])
    statistic = float(re.search(r'data-lr="statistic" data-value="([^"]+)"', markup).group(1))
    p_value = float(re.search(r'data-lr="p_value" data-value="([^"]+)"', markup).group(1))
    df = int(re.search(r'<span data-lr="df">(\d+)</span>', markup).group(1))
    risk, raw = (read_fitted(lease.fitted_path(name)) for name in ("default_risk", "default_raw"))
    assert statistic == 2 * (risk.fit["log_likelihood"] - raw.fit["log_likelihood"])

    results = {}
    connection = duckdb.connect(str(lease.engine.path), read_only=True)
    try:
        for fitted in (risk, raw):
            # A learned term (sector_level) is fitted on its design columns, in the table the fit expands.
            learned = any(term.learned for term in fitted.model_terms)
            design = connection.execute(f'SELECT * FROM "design_{fitted.model}{"__columns" if learned else ""}"').df()
            names = [name for term in fitted.model_terms for name in (
                [f"_{term.name}__{i}" for i in range(1, len(term.learned["columns"]) + 1)] if term.learned else [term.name])]
            rows = design[~design["_holdout"].astype(bool) & design[[fitted.target, *names]].notna().all(axis=1)]
            results[fitted.model] = sm.GLM(rows[fitted.target], sm.add_constant(rows[names]), family=sm.families.Binomial()).fit()
    finally:
        connection.close()
    big, small = results["default_risk"], results["default_raw"]
    assert big.nobs == small.nobs == risk.rows["train"]
    reference = 2 * (big.llf - small.llf)
    assert statistic == pytest.approx(reference, abs=1e-6)
    assert df == int(big.df_model - small.df_model) == 8  # 3 terms, and sector_level's 5 columns
    assert p_value == pytest.approx(chi2.sf(reference, big.df_model - small.df_model), rel=1e-6)


# --- refusals and reasons -----------------------------------------------------------------------


def test_comparing_models_of_different_targets_is_refused(demos):
    lease = demos["lease"]
    raw = read_fitted(lease.fitted_path("default_raw"))
    # A fitted file of another target that agrees with itself (its depends_on and model fingerprint).
    depends_on = {**raw.depends_on, "target": "late_12m"}
    write_fitted(lease.fitted_path("late_payments"), dataclasses.replace(
        raw, model="late_payments", target="late_12m", depends_on=depends_on, fingerprint=dependencies_fingerprint(depends_on)))
    try:
        with pytest.raises(FeatpipeError, match="compare two models of the same target"):
            write_report(lease, "default_risk", against="late_payments")
    finally:
        lease.fitted_path("late_payments").unlink()


def test_likelihood_ratio_says_why_when_it_does_not_apply(demos):
    lease = demos["lease"]
    risk, raw = (read_fitted(lease.fitted_path(name)) for name in ("default_risk", "default_raw"))
    rows = risk.rows["train"]
    assert likelihood_ratio(risk, raw, (rows, rows, rows)).reason is None
    assert likelihood_ratio(raw, risk, (rows, rows, rows)).larger == "default_risk"
    assert "not fitted on the same rows" in likelihood_ratio(risk, raw, (rows, rows + 7, rows)).reason
    extra = dataclasses.replace(raw.terms[1], name="other_term", fingerprint="ffffffffffffffff")
    not_nested = dataclasses.replace(raw, terms=(*raw.terms, extra))
    assert "not nested" in likelihood_ratio(risk, not_nested, (rows, rows, rows)).reason
    penalized = dataclasses.replace(raw, penalty={"l2": 0.5, "l1": 0.0})
    assert "penalty" in likelihood_ratio(risk, penalized, (rows, rows, rows)).reason
    assert "same terms" in likelihood_ratio(risk, dataclasses.replace(risk, model="copy"), (rows, rows, rows)).reason


def test_default_pair_is_the_two_inputs_most_terms_read_together(demos):
    risk = read_fitted(demos["lease"].fitted_path("default_risk"))
    claims = read_fitted(demos["fleet"].fitted_path("claim_frequency"))
    raw = read_fitted(demos["lease"].fitted_path("default_raw"))
    numeric = {"monthly_payment", "monthly_revenue", "firm_age_years", "past_late_payments", "term_months"}
    # payment_to_revenue and young_and_stretched both read payment and revenue
    assert default_pair(risk, numeric) == ("monthly_payment", "monthly_revenue")
    # night_share and heavy_night_share both read annual and night kilometres
    assert default_pair(claims, {"vehicle_age_years", "annual_km", "drivers", "night_km"}) == ("annual_km", "night_km")
    # no term of the raw model reads two inputs: its first two numeric inputs
    assert default_pair(raw, numeric) == ("firm_age_years", "monthly_revenue")


def test_a_chosen_pair_and_a_stale_fit_show_in_the_report(demos, tmp_path):
    lease = demos["lease"]
    (tmp_path / "never.html").write_text("an earlier report", encoding="utf-8")
    with pytest.raises(FeatpipeError, match="column 'sector' is not numeric"):
        write_report(lease, "default_risk", pair=("sector", "monthly_payment"), out=tmp_path / "never.html")
    with pytest.raises(FeatpipeError, match="does not read column 'sector'; choose among firm_age_years"):
        write_report(lease, "default_raw", pair=("sector", "monthly_payment"), out=tmp_path / "never.html")
    assert (tmp_path / "never.html").read_text(encoding="utf-8") == "an earlier report"  # a refusal writes nothing
    terms = lease.root / "terms" / "affordability.sql"
    original = terms.read_text(encoding="utf-8")
    terms.write_text(original.replace("LN(CASE WHEN monthly_revenue > 0", "LN(CASE WHEN monthly_revenue > 1"), encoding="utf-8")
    try:
        with pytest.raises(FeatpipeError, match=r"fitted/default_raw.yaml is stale: term 'log_revenue' changed meaning; "
                                                r"run `featpipe fit .*--allow-stale"):
            write_report(api.load_project(lease.root), "default_raw", out=tmp_path / "raw.html")
        written = write_report(api.load_project(lease.root), "default_raw", pair=("term_months", "firm_age_years"),
                               out=tmp_path / "raw.html", allow_stale=True)
    finally:
        terms.write_text(original, encoding="utf-8")
    text = text_of(page(written))
    assert "Over term_months and firm_age_years" in text
    assert "stale: term 'log_revenue' changed meaning; run `featpipe fit default_raw`" in text
    assert written == tmp_path / "raw.html"


def test_the_report_data_are_the_same_on_postgresql(demos, postgres_engine):
    """Ranges, held values, grids and predictions gathered on PostgreSQL equal DuckDB's (real engines)."""
    lease = demos["lease"]
    source = lease.inputs["leases"]
    risk, raw = (read_fitted(lease.fitted_path(name)) for name in ("default_risk", "default_raw"))
    postgres_engine.load_file("leases", source.load)
    on_postgres = gather(postgres_engine, source, risk, raw)
    with api.connect(lease) as engine:
        on_duckdb = gather(engine, source, risk, raw)
    assert on_postgres.held.keys() == on_duckdb.held.keys()
    for name, value in on_duckdb.held.items():
        assert on_postgres.held[name] == (value if isinstance(value, str) else pytest.approx(value, rel=1e-12)), name
    assert on_postgres.shared_rows == on_duckdb.shared_rows == (3435, 3435, 3435)
    assert on_postgres.figures == on_duckdb.figures
    for mine, theirs in zip(on_postgres.curves, on_duckdb.curves, strict=True):
        assert mine.x == theirs.x if mine.kind == "levels" else mine.x == pytest.approx(theirs.x, rel=1e-12)
        for model in ("default_risk", "default_raw"):
            np.testing.assert_allclose(mine.predictions[model], theirs.predictions[model], rtol=1e-12)
    for model in ("default_risk", "default_raw"):
        np.testing.assert_allclose(on_postgres.surface.predictions[model], on_duckdb.surface.predictions[model], rtol=1e-12)
    assert on_postgres.surface.points == on_duckdb.surface.points  # the same MD5-ordered sample


def holdout_deviance_residual_deciles(project, fitted, family) -> list[dict]:
    """Deciles of the held-out predictions (numpy on the design table, NTILE's split: larger groups first)
    with statsmodels' deviance residuals (reference library) summarised by numpy's linear percentiles."""
    # A learned term (vehicle_age_curve, sector_level) is read as its design columns with their coefficients.
    design, b = fitted_design(project, fitted)
    names = list(b)[1:]
    needed = [fitted.target, *names, *(["_offset"] if fitted.offset else [])]
    rows = design[design["_holdout"].astype(bool) & design[needed].notna().all(axis=1)]
    eta = b["(intercept)"] + sum(b[name] * rows[name].to_numpy() for name in names)
    eta = eta + (rows["_offset"].to_numpy() if fitted.offset else 0.0)
    mu = np.exp(eta) if family is sm.families.Poisson else eta
    y = rows[fitted.target].to_numpy()
    order = np.lexsort((rows[fitted.key].to_numpy(), mu))
    residuals = family().resid_dev(y, mu)
    deciles = []
    for number, chunk in enumerate(np.array_split(order, 10), start=1):
        q10, q25, q50, q75, q90 = np.percentile(residuals[chunk], [10, 25, 50, 75, 90])
        deciles.append({"decile": number, "rows": len(chunk), "mean_predicted": mu[chunk].mean(),
                        "mean_observed": y[chunk].mean(), "q10": q10, "q25": q25, "q50": q50, "q75": q75, "q90": q90})
    return deciles


def test_poisson_residual_deciles_equal_statsmodels_deviance_residuals(demos):
    fleet = demos["fleet"]
    fitted = read_fitted(fleet.fitted_path("claim_frequency"))
    with api.connect(fleet) as engine:
        shown = gather(engine, fleet.inputs["vehicle_years"], fitted).figures.residual_deciles
    expected = holdout_deviance_residual_deciles(fleet, fitted, sm.families.Poisson)
    assert [d["rows"] for d in shown] == [d["rows"] for d in expected] == [121] * 8 + [120] * 2
    for mine, theirs, calibration in zip(shown, expected, fitted.metrics["calibration"], strict=True):
        assert mine == pytest.approx(theirs, rel=1e-9, abs=1e-12)
        # The fitted file writes 12 significant digits: up to 5e-12 relative from the value it rounds.
        assert mine["mean_predicted"] == pytest.approx(calibration["mean_predicted"], rel=5e-12)


GAUSSIAN_MODEL = """\
input: leases
target: monthly_payment
family: gaussian
terms: [firm_age_years, log_revenue, term_months, sector_level]
holdout: {fraction: 0.3, salt: "v1"}
"""


def test_a_gaussian_model_gets_its_report_with_residuals_by_decile(demos):
    lease = demos["lease"]
    spec = lease.root / "specs" / "payment_size.yaml"
    spec.write_text(GAUSSIAN_MODEL, encoding="utf-8")
    try:
        project = api.load_project(lease.root)
        api.fit(project, ["payment_size"])
        written = write_report(project, "payment_size")
        fitted = read_fitted(project.fitted_path("payment_size"))
        with api.connect(project) as engine:
            shown = gather(engine, project.inputs["leases"], fitted).figures.residual_deciles
    finally:
        spec.unlink()
    markup = page(written)
    # intervals, 4 inputs, surface, 2 checks, and sector_level's figure
    assert len(re.findall(r"<figure[^>]*>\s*<svg", markup)) == 1 + 4 + 1 + 2 + 1
    assert "difference per step" in markup and "Deviance residuals by decile" in markup
    for mine, theirs in zip(shown, holdout_deviance_residual_deciles(project, fitted, sm.families.Gaussian), strict=True):
        assert mine == pytest.approx(theirs, rel=1e-9, abs=1e-9)


# --- the trade's metrics and honest comparisons ------------------------------------------------


def fitted_design(project, fitted) -> tuple[pd.DataFrame, dict[str, float]]:
    """The table the model was fitted on and its coefficient per design column: a learned term
    (sector_level) is fitted on its columns, in the table the fit expands them into."""
    learned = any(term.learned for term in fitted.model_terms)
    connection = duckdb.connect(str(project.engine.path), read_only=True)
    try:
        design = connection.execute(f'SELECT * FROM "design_{fitted.model}{"__columns" if learned else ""}"').df()
    finally:
        connection.close()
    b = {"(intercept)": fitted.terms[0].estimate}
    for term in fitted.model_terms:
        b.update({f"_{term.name}__{i}": item["estimate"] for i, item in enumerate(term.learned["columns"], start=1)}
                 if term.learned else {term.name: term.estimate})
    return design, b


def held_out_frame(project, fitted) -> pd.DataFrame:
    """The held-out complete rows of the model's design table with the prediction computed by numpy."""
    design, b = fitted_design(project, fitted)
    names = list(b)[1:]
    rows = design[design["_holdout"].astype(bool) & design[[fitted.target, *names]].notna().all(axis=1)]
    eta = b["(intercept)"] + sum(b[name] * rows[name].to_numpy() for name in names)
    return pd.DataFrame({fitted.key: rows[fitted.key].to_numpy(), "y": rows[fitted.target].to_numpy(),
                         "p": 1 / (1 + np.exp(-eta))})


def test_delongs_test_in_the_comparison_matches_numpy_on_the_common_held_out_rows(demos):
    lease = demos["lease"]
    markup = page(demos["compared"])
    shown = {name: float(value) for name, value in re.findall(r'data-delong="(\w+)" data-value="([^"]+)"', markup)}
    risk, raw = (read_fitted(lease.fitted_path(name)) for name in ("default_risk", "default_raw"))
    both = held_out_frame(lease, risk).merge(held_out_frame(lease, raw), on=risk.key, suffixes=("_risk", "_raw"))
    assert len(both) == risk.metrics["rows"] == raw.metrics["rows"]
    # The numpy DeLong written from the paper (tests/delong_reference.py) on the same rows.
    aucs, covariance = delong_reference(both["y_risk"].to_numpy(), [both["p_risk"].to_numpy(), both["p_raw"].to_numpy()])
    std_error = math.sqrt(covariance[0, 0] + covariance[1, 1] - 2 * covariance[0, 1])
    assert shown["difference"] == pytest.approx(aucs[0] - aucs[1], rel=1e-9)
    assert shown["difference"] == pytest.approx(risk.metrics["auc"] - raw.metrics["auc"], rel=1e-9)
    assert shown["std_error"] == pytest.approx(std_error, rel=1e-9)
    assert shown["z"] == pytest.approx((aucs[0] - aucs[1]) / std_error, rel=1e-9)
    assert shown["p_value"] == pytest.approx(2 * norm.sf(abs(shown["z"])), rel=1e-9)  # scipy's normal tail
    assert 'id="left-out"' not in markup  # same rows, same family, both unpenalized: every comparison applies


def comparison_of(demos, **changes):
    """compare() of default_risk against default_raw changed by `changes`, on the same rows unless told."""
    lease = demos["lease"]
    risk, raw = (read_fitted(lease.fitted_path(name)) for name in ("default_risk", "default_raw"))
    rows, held = risk.rows["train"], risk.rows["holdout"]
    shared_rows = changes.pop("shared_rows", (rows, rows, rows))
    shared_holdout = changes.pop("shared_holdout", (held, held, held))
    other = dataclasses.replace(raw, **changes)
    found = compare(risk, other, shared_rows, shared_holdout, None)
    return found, dict(found.left_out), readings.comparison(risk, other, found)


def test_aic_is_offered_only_for_the_same_rows(demos):
    found, _, reading = comparison_of(demos)
    risk, raw = (read_fitted(demos["lease"].fitted_path(name)) for name in ("default_risk", "default_raw"))
    assert found.aic_difference == risk.fit["aic"] - raw.fit["aic"]
    assert reading.startswith("AIC favours default_risk by")
    rows = risk.rows["train"]
    found, left_out, reading = comparison_of(demos, shared_rows=(rows, rows, rows - 40))
    assert found.aic_difference is None and "AIC favours" not in reading
    assert left_out["AIC"].startswith("the models were not fitted on the same rows")
    assert "Left out: AIC, because the models were not fitted on the same rows" in reading


def test_aic_and_the_likelihood_ratio_are_left_out_for_a_penalized_model(demos):
    found, left_out, reading = comparison_of(demos, penalty={"l2": 0.5, "l1": 0.0})
    assert found.aic_difference is None and found.likelihood_ratio.reason is not None
    assert "penalty" in left_out["AIC"] and "penalty" in left_out["likelihood-ratio test"]
    assert "AIC favours" not in reading and "likelihood-ratio statistic" not in reading


def test_aic_and_the_likelihood_ratio_are_left_out_for_different_families(demos):
    found, left_out, _ = comparison_of(demos, family="poisson", link="log")
    assert found.aic_difference is None
    assert left_out["AIC"].startswith("the families differ (binomial and poisson)")
    assert "families differ" in left_out["likelihood-ratio test"]


def test_delongs_test_is_left_out_for_different_held_out_rows(demos):
    held = read_fitted(demos["lease"].fitted_path("default_risk")).rows["holdout"]
    found, left_out, reading = comparison_of(demos, shared_holdout=(held, held + 12, held - 30))
    assert found.auc_test is None
    assert left_out["DeLong's test of the AUCs"].startswith("the models were not measured on the same held-out rows")
    assert "measured on different held-out rows" in found.thresholds


def test_the_comparison_says_accuracy_uses_each_models_own_threshold(demos):
    same, _, reading = comparison_of(demos)
    assert "Accuracy, precision and recall use the same threshold, 0.2, for both." in same.thresholds
    assert same.thresholds in reading and same.thresholds in text_of(page(demos["compared"]))
    differ, _, reading = comparison_of(demos, threshold=0.5)
    assert ("Accuracy, precision and recall use each model's own threshold (0.2 for default_risk, 0.5 for "
            "default_raw): they compare two decision rules, not two scores") in differ.thresholds
    assert differ.thresholds in reading


SMALLER_GAUSSIAN_MODEL = GAUSSIAN_MODEL.replace("terms: [firm_age_years, log_revenue, term_months, sector_level]",
                                                "terms: [log_revenue, term_months]")


def test_nested_gaussian_models_get_the_f_test_beside_the_likelihood_ratio(demos):
    lease = demos["lease"]
    specs = {"payment_size": GAUSSIAN_MODEL, "payment_size_small": SMALLER_GAUSSIAN_MODEL}
    for name, text in specs.items():
        (lease.root / "specs" / f"{name}.yaml").write_text(text, encoding="utf-8")
    try:
        project = api.load_project(lease.root)
        api.fit(project, list(specs))
        markup = page(write_report(project, "payment_size", against="payment_size_small"))
        big, small = (read_fitted(project.fitted_path(name)) for name in specs)
        design, b = fitted_design(project, big)
    finally:
        for name in specs:
            (lease.root / "specs" / f"{name}.yaml").unlink()
    shown = {name: float(value) for name, value in re.findall(r'data-f="(\w+)" data-value="([^"]+)"', markup)}
    names = list(b)[1:]
    rows = design[~design["_holdout"].astype(bool) & design[["monthly_payment", *names]].notna().all(axis=1)]
    assert len(rows) == big.rows["train"] == small.rows["train"]
    # statsmodels' OLS F test of the restricted model on the same rows.
    larger = sm.OLS(rows["monthly_payment"], sm.add_constant(rows[names])).fit()
    smaller = sm.OLS(rows["monthly_payment"], sm.add_constant(rows[["log_revenue", "term_months"]])).fit()
    statistic, p_value, df = larger.compare_f_test(smaller)
    assert shown["statistic"] == pytest.approx(statistic, rel=1e-7)
    assert shown["p_value"] == pytest.approx(p_value, rel=1e-6, abs=1e-300)
    # firm_age_years and the sector's level columns (construction the reference)
    assert re.search(r'<span data-f="df">(\d+)</span>', markup).group(1) == str(int(df)) == str(1 + len(big.term("sector_level").learned["columns"]))
    assert re.search(r'<span data-f="residual_df">(\d+)</span>', markup).group(1) == str(int(larger.df_resid))
    assert 'id="likelihood-ratio"' in markup and 'id="delong-test"' not in markup  # DeLong is for binomial pairs


def test_the_gains_table_in_the_report_is_the_fitted_files(demos):
    markup = page(demos["compared"])
    risk = read_fitted(demos["lease"].fitted_path("default_risk"))
    table = markup.split('id="gains-table"')[1].split("</table>")[0]
    shown = re.findall(r'<tr data-decile="(\d+)">(.*?)</tr>', table, re.S)
    assert [int(decile) for decile, _ in shown] == list(range(1, 11))
    for (_, row), entry in zip(shown, risk.metrics["gains"], strict=True):
        assert dict(re.findall(r'data-gains="(\w+)">([^<]*)<', row)) == {
            key: metric_text(entry[key]) for key in ("rows", "events", "event_rate", "cumulative_event_share", "lift")}
    # The deciles hold every held-out row and every event, the highest predictions first.
    assert sum(entry["rows"] for entry in risk.metrics["gains"]) == risk.metrics["rows"]
    assert sum(entry["events"] for entry in risk.metrics["gains"]) == risk.metrics["events"]
