"""`errors: robust` (HC1 sandwich standard errors) and `errors: {cluster: c}` in a spec: the fitted file
records sandwich standard errors, z tests and intervals, how they were made, and why HC1.

Reference: statsmodels GLM with cov_type='HC0' (times n / (n - p), the HC1 correction as MacKinnon and
White define it, recalled from memory; statsmodels' GLM leaves 'HC1' uncorrected) and cov_type='cluster'
(its default correction G / (G - 1) (n - 1) / (n - p)). The same figures on DuckDB, PostgreSQL and Spark
are checked in test_inference_engines.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import run_featpipe, write_project
from test_quasi_families import overdispersed_counts

from featpipe import api
from featpipe.errors import FeatpipeError
from featpipe.fitted import read_fitted
from featpipe.fitted.file import staleness
from featpipe.glm import Glm
from featpipe.project import load_project

PROJECT = """\
name: visits
engine: {kind: duckdb, path: build/visits.duckdb}
inputs:
  visits:
    key: visit_id
    load: data/visits.csv
    columns: {visit_id: BIGINT, clinic: VARCHAR, age: DOUBLE, dose: DOUBLE, events: BIGINT, n: BIGINT}
"""


def visits(rows: int = 360, seed: int = 3) -> pd.DataFrame:
    """Invented counts whose clinics share an unobserved level, so rows within a clinic are correlated."""
    rng = np.random.default_rng(seed)
    clinic = rng.integers(0, 24, rows)
    level = rng.normal(scale=0.5, size=24)[clinic]
    age, dose = rng.normal(50, 10, rows), rng.integers(0, 4, rows).astype(float)
    events = rng.poisson(np.exp(-1.5 + 0.03 * age - 0.2 * dose + level))
    return pd.DataFrame({"visit_id": np.arange(rows), "clinic": [f"c{c:02d}" for c in clinic], "age": age, "dose": dose,
                         "events": events, "n": rng.integers(1, 4, rows)})


def visits_project(root, errors: str, extra: str = "", frame: pd.DataFrame | None = None) -> pd.DataFrame:
    frame = visits() if frame is None else frame
    write_project(root, {"featpipe.yaml": PROJECT, "terms/basket.sql": None, "specs/returns.yaml": None, "data/orders.csv": None,
                         "specs/events.yaml": f"input: visits\ntarget: events\nfamily: poisson\nterms: [age, dose]\n"
                                              f"holdout: {{fraction: 0.0}}\nerrors: {errors}\n{extra}"})
    (root / "data").mkdir(exist_ok=True)
    frame.to_csv(root / "data/visits.csv", index=False)
    return frame


def reference(frame: pd.DataFrame, **fit):
    model = sm.GLM(frame["events"].to_numpy(float), sm.add_constant(frame[["age", "dose"]].to_numpy()), family=sm.families.Poisson())
    return model.fit(tol=1e-13, **fit)


def test_errors_robust_writes_hc1_sandwich_errors_and_says_why(tmp_path):
    frame = visits_project(tmp_path / "p", "robust")
    project = load_project(tmp_path / "p")
    api.fit(project)
    fitted = read_fitted(project.fitted_path("events"))
    rows = len(frame)
    # Reference: statsmodels GLM cov_type='HC0', times n / (n - p) for HC1.
    hc0 = reference(frame, cov_type="HC0")
    errors = [term.std_error for term in fitted.terms]
    np.testing.assert_allclose(errors, hc0.bse * np.sqrt(rows / (rows - 3)), rtol=1e-7)
    np.testing.assert_allclose([term.statistic for term in fitted.terms], hc0.params / np.array(errors), rtol=1e-7)
    assert fitted.fit["errors"] == {"kind": "HC1", "clusters": rows, "correction": pytest.approx(rows / (rows - 3), rel=1e-11)}  # written to 12 digits
    assert fitted.fit["statistic"] == "z"
    assert "HC1, chosen over HC0" in fitted.fit["conventions"]["errors"]
    assert "sandwich standard errors" in fitted.fit["conventions"]["p_values"]
    assert fitted.depends_on["errors"] == "robust"
    # Sandwich errors differ from the model's own (the counts are overdispersed by the clinics).
    assert errors[1] != pytest.approx(reference(frame).bse[1], rel=0.05)


def test_errors_by_cluster_match_statsmodels_cluster_and_record_the_column(tmp_path):
    frame = visits_project(tmp_path / "p", "{cluster: clinic}")
    project = load_project(tmp_path / "p")
    api.fit(project)
    fitted = read_fitted(project.fitted_path("events"))
    # Reference: statsmodels GLM cov_type='cluster' with its default small-sample correction.
    groups = pd.factorize(frame["clinic"])[0]
    clustered = reference(frame, cov_type="cluster", cov_kwds={"groups": groups})
    np.testing.assert_allclose([term.std_error for term in fitted.terms], clustered.bse, rtol=1e-7)
    np.testing.assert_allclose([term.p_value for term in fitted.terms], clustered.pvalues, rtol=1e-6)
    np.testing.assert_allclose([term.ci_high for term in fitted.terms], clustered.conf_int()[:, 1], rtol=1e-7)
    assert fitted.fit["errors"]["kind"] == "cluster" and fitted.fit["errors"]["column"] == "clinic"
    assert fitted.fit["errors"]["clusters"] == 24
    assert fitted.depends_on["errors"] == {"cluster": "clinic"}


def test_changing_errors_makes_the_fit_stale_and_a_hand_edit_is_refused(tmp_path):
    visits_project(tmp_path / "p", "robust")
    project = load_project(tmp_path / "p")
    api.fit(project)
    spec = tmp_path / "p/specs/events.yaml"
    spec.write_text(spec.read_text().replace("errors: robust", "errors: {cluster: clinic}"))
    compiled = api.check(load_project(tmp_path / "p"))
    changes = staleness(read_fitted(project.fitted_path("events")), compiled.models["events"])
    assert changes == ["errors changed from robust to {'cluster': 'clinic'}"]
    spec.write_text(spec.read_text().replace("errors: {cluster: clinic}", "errors: model"))
    compiled = api.check(load_project(tmp_path / "p"))
    assert staleness(read_fitted(project.fitted_path("events")), compiled.models["events"]) == ["errors changed from robust to none"]
    path = project.fitted_path("events")
    path.write_text(path.read_text().replace("kind: HC1", "kind: cluster"))
    with pytest.raises(FeatpipeError, match="fit.errors must record the standard errors depends_on.errors asks for"):
        read_fitted(path)


@pytest.mark.parametrize(("errors", "extra", "message"), [
    ("sandwich", "", "specs/events.yaml:6:9: errors must be model, robust (sandwich standard errors) or {cluster: column}, not 'sandwich'"),
    ("{cluster: ward}", "", "specs/events.yaml:6:19: cluster column 'ward' is not a column of input 'visits'"),
    ("robust", "weights: {column: n, kind: frequency}\n",
     "specs/events.yaml:6:9: errors: robust sums each row's own score, but a frequency-weighted row stands for several rows"),
    ("robust", "penalty: {l2: 0.1}\n", "specs/events.yaml:6:9: a penalized fit has no Wald inference, robust or not"),
])
def test_errors_the_spec_cannot_use_are_refused_with_their_line(tmp_path, errors, extra, message):
    visits_project(tmp_path / "p", errors, extra)
    result = run_featpipe("check", cwd=tmp_path / "p")
    assert result.returncode == 1 and "Traceback" not in result.stdout + result.stderr
    assert message in result.stdout + result.stderr


def test_a_training_row_without_a_cluster_is_refused(tmp_path):
    frame = visits()
    frame.loc[5, "clinic"] = None
    visits_project(tmp_path / "p", "{cluster: clinic}", frame=frame)
    result = run_featpipe("fit", cwd=tmp_path / "p")
    assert result.returncode == 1 and "Traceback" not in result.stdout + result.stderr
    assert "the cluster column is NULL in some training rows" in result.stdout + result.stderr
    assert not (tmp_path / "p/fitted/events.yaml").exists()


def test_the_overdispersion_warning_names_robust_errors():
    x, y = overdispersed_counts()
    fit = Glm("poisson").fit_arrays(x, y)
    (warning,) = [w for w in fit.warnings if "overdispersion" in w]
    assert "errors: robust (sandwich standard errors" in warning
