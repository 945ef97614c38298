"""A fit goes stale when anything it depends on changes, spec settings included: `featpipe check` names
the change, `refresh` refits so the fitted file follows, and score, drift and report refuse a stale
model with one message.

The demo projects' committed fitted files are current, so a copy of a demo is fitted as it stands;
each test edits its spec and watches the fitted file react.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from conftest import copy_demo, run_featpipe
from sklearn.metrics import accuracy_score, precision_score, recall_score

from featpipe import api
from featpipe.engines.statements import select_all
from featpipe.errors import FeatpipeError
from featpipe.fitted import INTERCEPT, read_fitted
from featpipe.fitted.drift import drift
from featpipe.fitted.report import write_report
from featpipe.fitted.scoring import score
from featpipe.project import load_project
from featpipe.sqlgen.common import holdout_rows

MODEL = "default_risk"


def edit(path, old: str, new: str) -> None:
    text = path.read_text(encoding="utf-8")
    assert old in text
    path.write_text(text.replace(old, new), encoding="utf-8")


def refit_by_refresh(root) -> None:
    """`featpipe refresh` refits the edited model, and afterwards nothing is stale."""
    outcomes = {outcome.model: outcome.changed for outcome in api.refresh(load_project(root))}
    assert outcomes[MODEL] is True
    assert api.check_report(load_project(root)).stale == ()


def test_an_edited_threshold_is_named_by_check_and_refresh_recomputes_the_class_metrics(tmp_path):
    root = copy_demo("lease_default", tmp_path)
    before = read_fitted(root / "fitted" / f"{MODEL}.yaml")
    edit(root / "specs" / f"{MODEL}.yaml", "threshold: 0.2", "threshold: 0.3")

    checked = run_featpipe("check", "-p", str(root))
    assert checked.returncode == 0, checked.stderr
    assert checked.stdout.splitlines()[1:] == [
        f"stale fit: fitted/{MODEL}.yaml is stale: threshold changed from 0.2 to 0.3"]

    refit_by_refresh(root)
    fitted = read_fitted(root / "fitted" / f"{MODEL}.yaml")
    assert fitted.threshold == 0.3 and fitted.depends_on["threshold"] == 0.3
    assert fitted.coefficients == before.coefficients  # the threshold changes no estimate
    project = load_project(root)
    layout = api.check(project).models[MODEL].layout
    # sector_level (a learned term) is read as its design columns, from the table the fit expands them into.
    estimates = {}
    for term in fitted.model_terms:
        estimates.update({f"_{term.name}__{i}": item["estimate"] for i, item in enumerate(term.learned["columns"], start=1)}
                         if term.learned else {term.name: term.estimate})
    layout = replace(layout, table=f"{layout.table}__columns", terms=tuple(estimates))
    with api.connect(project) as engine:
        rows = engine.fetch_frame(select_all(layout.table).where(holdout_rows(layout)))
    eta = fitted.coefficients[INTERCEPT] + rows[list(layout.terms)].to_numpy(float) @ np.array(list(estimates.values()))
    observed, flagged = rows[layout.target].to_numpy(int), 1 / (1 + np.exp(-eta)) >= 0.3
    # Reference library: scikit-learn's class metrics on the same held-out rows, flagged at 0.3.
    assert fitted.metrics["accuracy"] == pytest.approx(accuracy_score(observed, flagged), rel=1e-12)
    assert fitted.metrics["precision"] == pytest.approx(precision_score(observed, flagged), rel=1e-12)
    assert fitted.metrics["recall"] == pytest.approx(recall_score(observed, flagged), rel=1e-12)
    assert fitted.metrics["recall"] != before.metrics["recall"]


def test_an_edited_step_is_named_and_refresh_states_the_effect_per_the_new_step(tmp_path):
    root = copy_demo("lease_default", tmp_path)
    edit(root / "specs" / f"{MODEL}.yaml", "  firm_age_years: 5\n", "  firm_age_years: 10\n")
    assert api.check_report(load_project(root)).stale == (
        f"fitted/{MODEL}.yaml is stale: step of term 'firm_age_years' changed",)

    refit_by_refresh(root)
    age = read_fitted(root / "fitted" / f"{MODEL}.yaml").term("firm_age_years")
    assert age.effect.kind == "odds ratio" and age.effect.step == 10
    # The odds ratio for ten years, worked with numpy from the estimate and its interval.
    assert age.effect.value == pytest.approx(np.exp(10 * age.estimate), rel=1e-11)
    assert (age.effect.low, age.effect.high) == pytest.approx(np.exp(10 * np.array([age.ci_low, age.ci_high])), rel=1e-11)
    assert any(note.startswith("each increase of 10 in firm age years multiplies the odds") for note in age.notes)


def test_an_edited_note_is_named_and_refresh_writes_it_into_the_fitted_file(tmp_path):
    root = copy_demo("lease_default", tmp_path)
    new_note = "Credit policy treats firms under two years as start-ups; the desk reviews them by hand."
    edit(root / "specs" / f"{MODEL}.yaml", '"Credit policy treats firms under two years as start-ups."', f'"{new_note}"')
    assert api.check_report(load_project(root)).stale == (f"fitted/{MODEL}.yaml is stale: note of term 'young_firm' changed",)

    refit_by_refresh(root)
    assert read_fitted(root / "fitted" / f"{MODEL}.yaml").term("young_firm").notes[0] == new_note


@pytest.mark.parametrize("change, reason", [
    ("threshold", "threshold changed from 0.2 to 0.3"),
    ("spec removed", f"specs/{MODEL}.yaml no longer exists"),
])
def test_score_drift_and_report_refuse_a_stale_model_with_the_same_message(tmp_path, change, reason):
    root = copy_demo("lease_default", tmp_path)
    spec = root / "specs" / f"{MODEL}.yaml"
    if change == "threshold":
        edit(spec, "threshold: 0.2", "threshold: 0.3")
    else:
        spec.unlink()
    project = load_project(root)
    expected = (f"fitted/{MODEL}.yaml is stale: {reason}; run `featpipe fit -p {root} {MODEL}` "
                "or pass --allow-stale to use the fitted definitions anyway")
    refusals = {
        "score": lambda: score(project, MODEL, table="leases", into="scores"),
        "drift": lambda: drift(project, MODEL, "leases"),
        "report": lambda: write_report(project, MODEL),
    }
    for use, refused in refusals.items():
        with pytest.raises(FeatpipeError) as raised:
            refused()
        assert str(raised.value) == expected, use
    assert not (root / "build").exists()  # refused before opening the engine


def test_a_threshold_edit_refits_without_rebuilding_the_design_table(tmp_path):
    """Only the fit reads the threshold: refresh refits from the design table already in the engine."""
    root = copy_demo("lease_default", tmp_path)
    api.compute(load_project(root))
    edit(root / "specs" / f"{MODEL}.yaml", "threshold: 0.2", "threshold: 0.3")
    said: list[str] = []
    api.refresh(load_project(root), progress=said.append)
    assert f"fitting {MODEL}" in " ".join(said)
    assert not [line for line in said if line.startswith("building")]


def test_a_new_key_makes_the_fit_stale_and_refresh_rebuilds_on_it(tmp_path):
    """The key decides the holdout split, so the fit depends on it."""
    root = copy_demo("lease_default", tmp_path)
    data = root / "data" / "leases.csv"
    lines = data.read_text(encoding="utf-8").splitlines()
    data.write_text("\n".join([lines[0] + ",contract"] + [f"{line},C{line.split(',')[0]}" for line in lines[1:]]) + "\n")
    edit(root / "featpipe.yaml", "    key: lease_id\n", "    key: contract\n")
    edit(root / "featpipe.yaml", "      lease_id: BIGINT\n", "      lease_id: BIGINT\n      contract: VARCHAR\n")
    stale = api.check_report(load_project(root)).stale
    # The data file changed too (a new column), so the learned sector levels would be learned again.
    assert (f"fitted/{MODEL}.yaml is stale: key changed from lease_id to contract; the data of input 'leases' changed "
            "since the fit, so the learned constants of sector_level would be learned again") in stale

    said: list[str] = []
    api.refresh(load_project(root), progress=said.append)
    assert f"building design_{MODEL}" in said
    fitted = read_fitted(root / "fitted" / f"{MODEL}.yaml")
    assert fitted.key == "contract" and fitted.depends_on["key"] == "contract"
