"""Learned terms in the commands that read a fit: explain, drift, the report, diff and staleness, the
fitted file's checks on read, and holdout rows with a level training never saw.

One model with every kind of learned term (LEVELS with pooled levels, CAPPED, BINS, SPLINE) is fitted
once per module on invented leases; the tests that change data work on copies of it. References:
pandas counts and numpy quantiles (method="inverted_cdf") on the training rows, which are recomputed
from the keys with Python's hashlib (MD5, RFC 1321), the split the design table makes.
"""

from __future__ import annotations

import hashlib
import json
import math
import shutil
import subprocess

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import run_featpipe
from spline_reference import restricted_cubic_spline
from sqlglot import exp
from test_learned_terms import lease_project, lease_rows

from featpipe import api
from featpipe.engines.compute import connect
from featpipe.fitted import read_fitted, scoring
from featpipe.fitted.drift import drift
from featpipe.fitted.report import write_report
from featpipe.fitted.report.learned import learned_figures

TERMS = ("SELECT LEVELS(sector, 40) AS sector_level,\n  CAPPED(income, 0.05, 0.95) AS capped_income,\n"
         "  BINS(income, 4) AS income_band,\n  SPLINE(income, 4) AS income_curve FROM leases\n")
LEARNED = ["sector_level", "capped_income", "income_band", "income_curve"]


def held_out(key: int, salt: str = "s1", fraction: float = 0.25) -> bool:
    """The design table's split: MD5('salt:key'), first 8 hex digits below fraction * 16**8 (hashlib)."""
    return int(hashlib.md5(f"{salt}:{key}".encode()).hexdigest()[:8], 16) < round(fraction * 16**8)


def training_frame(data: dict) -> pd.DataFrame:
    frame = pd.DataFrame(data)
    return frame[~frame["lease_id"].map(held_out)].reset_index(drop=True)


def git(root, *args):
    subprocess.run(["git", *args], cwd=root, check=True, capture_output=True)


@pytest.fixture(scope="module")
def fitted_project(tmp_path_factory):
    """The fitted model with every kind of learned term, committed in a git repository of its own."""
    root, data = lease_project(tmp_path_factory.mktemp("learned"), TERMS, LEARNED)
    project = api.load_project(root)
    api.fit(project)
    git(root, "init", "-q")
    git(root, "-c", "user.email=t@example.com", "-c", "user.name=t", "add", ".")
    git(root, "-c", "user.email=t@example.com", "-c", "user.name=t", "commit", "-q", "-m", "fit")
    return root, data


@pytest.fixture
def project_copy(fitted_project, tmp_path):
    root, data = fitted_project
    copy = tmp_path / "leases"
    shutil.copytree(root, copy)
    return copy, data


# --- explain ---------------------------------------------------------------------------------------

def test_explain_shows_a_learned_terms_constants_and_columns_with_their_readings(fitted_project):
    root, data = fitted_project
    result = run_featpipe("explain", "sector_level", cwd=root)
    assert result.returncode == 0, result.stderr
    text = result.stdout
    counts = training_frame(data)["sector"].value_counts()  # pandas on the training rows
    assert "LEVELS(\"sector\", 40)" in text
    shown = ", ".join(f"{level} {rows}" + (" (reference)" if level == "retail" else
                                           " (pooled into other)" if rows < 40 else "")
                      for level, rows in counts.items())
    assert f"levels with their training rows: {shown}" in text
    fitted = read_fitted(api.load_project(root).fitted_path("risk"))
    for item in fitted.term("sector_level").learned["columns"]:
        assert f"{item['label']}: estimate {item['estimate']:.4g}" in text and item["reading"] in text
    assert "joint Wald test of its 4 columns" in text
    # The knots of the spline, as numpy's inverted-CDF quantiles of the training incomes.
    spline = run_featpipe("explain", "income_curve", cwd=root)
    knots = np.quantile(training_frame(data)["income"], [0.05, 0.35, 0.65, 0.95], method="inverted_cdf")
    assert f"knots: {', '.join(f'{v:.15g}' for v in knots)}" in spline.stdout
    assert "spline 2: estimate" in spline.stdout


# --- every command on the model -------------------------------------------------------------------

@pytest.mark.parametrize("command", [
    ["explain", "risk"], ["explain", "sector_level", "--json"], ["explain", "income_band"], ["explain", "capped_income"],
    ["report", "risk"], ["drift", "risk", "--table", "leases"], ["drift", "risk", "--table", "leases", "--json"],
    ["diff"], ["diff", "--format", "markdown"], ["sql", "risk", "--part", "drift"], ["sql", "risk", "--part", "score"],
    ["check"],
], ids=" ".join)
def test_every_command_reads_a_model_with_every_kind_of_learned_term(project_copy, command):
    root, _ = project_copy
    result = run_featpipe(*command, cwd=root)
    assert result.returncode == 0, result.stdout + result.stderr
    assert "internal error" not in result.stdout + result.stderr


# --- drift -----------------------------------------------------------------------------------------

def test_drift_bins_a_levels_term_by_its_levels_other_and_unseen_and_lists_unseen_levels(fitted_project):
    root, data = fitted_project
    project = api.load_project(root)
    # A batch: every fifth lease from a sector never seen (whaling), every seventh from a pooled one.
    frame = pd.DataFrame(data)
    frame["sector"] = np.where(frame["lease_id"] % 5 == 0, "whaling",
                               np.where(frame["lease_id"] % 7 == 0, "mining", frame["sector"]))
    with connect(project) as engine:
        engine.execute(exp.Create(this=exp.to_table("batch"), kind="TABLE", replace=True, expression=exp.select(
            '"lease_id"', "CASE WHEN lease_id % 5 = 0 THEN 'whaling' WHEN lease_id % 7 = 0 THEN 'mining' ELSE sector END AS sector",
            '"branch"', '"income"', '"defaulted"').from_("leases")))
    report = drift(project, "risk", "batch")
    row = next(item for item in report.terms if item.name == "sector_level")
    fitted = read_fitted(project.fitted_path("risk"))
    learned = fitted.term("sector_level").learned
    train = training_frame(data)["sector"].value_counts()
    batch = frame["sector"].value_counts()
    pooled = sorted(learned["pooled"])
    assert pooled == sorted(train[train < 40].index)
    named = [level for level in train.index if level not in pooled]
    assert [b.label for b in row.bins] == [*named, "other", "unseen"]
    # Rows per bin: pandas counts of the batch.
    assert [b.rows for b in row.bins] == [int(batch.get(level, 0)) for level in named] + [
        int(sum(batch.get(level, 0) for level in pooled)), int(batch["whaling"])]
    # Expected shares: the training rows' (pandas); the unseen bin held no training row.
    total = train.sum()
    assert [b.expected for b in row.bins] == pytest.approx(
        [train[level] / total for level in named] + [train[pooled].sum() / total, 0.0], rel=1e-12)
    # PSI by its formula (numpy), shares floored at 0.0001 (the empty-bin rule, common practice).
    actual = np.maximum([b.actual for b in row.bins] + [0.0], 1e-4)
    expected = np.maximum([b.expected for b in row.bins] + [0.0], 1e-4)
    assert row.psi == pytest.approx(float(np.sum((actual - expected) * np.log(actual / expected))), rel=1e-9)
    assert row.unseen == (("whaling", int(batch["whaling"])),)
    # The mean contribution: the fitted columns' coefficient * (indicator - training mean), summed (numpy).
    columns = learned["columns"]
    labels = [item["label"] for item in columns]
    indicator = {label: ((frame["sector"] == label) if label != "other" else frame["sector"].isin(pooled + ["whaling"]))
                 for label in labels}
    contribution = sum(item["estimate"] * (indicator[item["label"]].astype(float) - item["mean"]) for item in columns)
    assert row.shift == pytest.approx(float(contribution.mean()), rel=1e-9)


def test_drift_bins_bins_and_spline_terms_by_their_arguments_training_deciles(fitted_project):
    root, data = fitted_project
    project = api.load_project(root)
    report = drift(project, "risk", "leases")
    fitted = read_fitted(project.fitted_path("risk"))
    income = pd.DataFrame(data)["income"].to_numpy()
    for name in ("income_band", "income_curve"):
        profile = fitted.term(name).profile
        # The argument's training profile: its min and max are the training incomes' (numpy).
        train = training_frame(data)["income"].to_numpy()
        assert (profile.min, profile.max, profile.count) == (train.min(), train.max(), len(train))
        row = next(item for item in report.terms if item.name == name)
        # Right-closed bins over the profile's edges, counted by numpy.
        expected = np.bincount(np.searchsorted(profile.edges, income, side="left"), minlength=len(profile.edges) + 1)
        assert [b.rows for b in row.bins] == expected.tolist()


# --- the report ------------------------------------------------------------------------------------

def test_the_report_draws_curves_for_spline_and_capped_and_points_for_levels_and_bins(fitted_project):
    root, data = fitted_project
    project = api.load_project(root)
    page = write_report(project, "risk").read_text(encoding="utf-8")
    for name in LEARNED:
        assert f'data-learned="{name}"><svg' in page
    fitted = read_fitted(project.fitted_path("risk"))
    with connect(project) as engine:
        figures = learned_figures(engine, fitted)
    train = training_frame(data)
    # LEVELS: the reference at 0, then each column's estimate with its interval and its training rows (pandas).
    levels = figures["sector_level"]
    learned = fitted.term("sector_level").learned
    counts = train["sector"].value_counts()
    pooled_rows = int(counts[learned["pooled"]].sum())
    assert levels.counts == (counts["retail"], *(pooled_rows if item["label"] == "other" else counts[item["label"]]
                                                 for item in learned["columns"]))
    assert levels.y == (0.0, *(item["estimate"] for item in learned["columns"]))
    assert levels.low[1:] == tuple(item["ci_low"] for item in learned["columns"])
    # BINS: training rows per bin, right-closed at the edges (numpy).
    edges = fitted.term("income_band").learned["values"]
    assert figures["income_band"].counts == tuple(np.bincount(
        np.searchsorted(edges, train["income"].to_numpy(), side="left"), minlength=len(edges) + 1).tolist())
    # SPLINE: the curve over the training range is the centred contribution of the restricted cubic
    # spline written from Harrell's formula (eq. 2.25; tests/spline_reference.py) with the fitted estimates.
    curve = figures["income_curve"]
    spline = fitted.term("income_curve").learned
    x = np.array(curve.x)
    assert (x[0], x[-1]) == (train["income"].min(), train["income"].max())
    basis = restricted_cubic_spline(x, spline["values"])
    expected = sum(item["estimate"] * (column - item["mean"]) for item, column in zip(spline["columns"], basis))
    np.testing.assert_allclose(curve.y, expected, rtol=1e-9, atol=1e-12)
    # CAPPED: a line between the caps (numpy's inverted-CDF quantiles), flat nowhere inside them.
    capped = figures["capped_income"]
    caps = np.quantile(train["income"], [0.05, 0.95], method="inverted_cdf")
    assert (capped.x[0], capped.x[-1]) == tuple(caps)
    assert sum(capped.counts) == len(train)


# --- the fitted file on read -----------------------------------------------------------------------

@pytest.mark.parametrize(("term", "edit", "problem"), [
    ("sector_level", lambda learned: learned["columns"].pop(2),
     "term sector_level (LEVELS) lists 3 column entries, but its 6 levels (at least 40 rows for a column of their own) "
     "give 4 (construction, transport, farming, other)"),
    ("income_band", lambda learned: learned["values"].append(1000.0),
     "term income_band (BINS) lists 3 column entries, but its 4 edges give 4 (bin 2, bin 3, bin 4, bin 5)"),
    ("income_curve", lambda learned: learned["values"].pop(),
     "term income_curve (SPLINE) lists 3 column entries, but its 3 knots give 2 (linear, spline 1)"),
])
def test_a_hand_edited_learned_term_with_another_column_count_is_refused_with_file_and_line(project_copy, term, edit, problem):
    root, _ = project_copy
    path = root / "fitted" / "risk.yaml"
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    entry = next(item for item in data["terms"] if item["name"] == term)
    edit(entry["learned"])
    text = yaml.safe_dump(data, sort_keys=False)
    path.write_text(text, encoding="utf-8")
    lines = text.splitlines()
    start = lines.index(f"- name: {term}")
    line = next(number for number, line in enumerate(lines[start:], start=start + 1) if line == "    columns:")
    result = run_featpipe("score", "risk", "--table", "leases", "--into", "scored", cwd=root)
    assert result.returncode == 1
    assert result.stderr.strip().splitlines() == [
        f"error: fitted/risk.yaml:{line}: {problem}; the file was edited by hand; run featpipe fit"]
    with connect(api.load_project(root)) as engine:
        assert engine.describe("scored") is None


# --- new data: stale, then diff --------------------------------------------------------------------

def test_new_data_makes_the_fit_stale_and_diff_shows_the_learned_constants_that_moved(project_copy):
    root, data = project_copy
    csv = root / "data" / "leases.csv"
    rng = np.random.default_rng(3)
    added = {"lease_id": np.arange(5001, 5121), "sector": ["whaling"] * 120, "branch": [2] * 120,
             "income": np.round(rng.uniform(40, 90, 120), 2), "defaulted": rng.integers(0, 2, 120)}
    with csv.open("a", encoding="utf-8") as stream:
        for values in zip(*added.values()):
            stream.write(",".join(str(float(v)) if isinstance(v, float) else str(v) for v in values) + "\n")
    checked = run_featpipe("check", cwd=root)
    assert ("fitted/risk.yaml is stale: the data of input 'leases' changed since the fit, so the learned constants "
            "of sector_level, capped_income, income_band, income_curve would be learned again") in checked.stdout
    refused = run_featpipe("score", "risk", "--table", "leases", "--into", "scored", cwd=root)
    assert refused.returncode == 1 and "is stale: the data of input 'leases' changed" in refused.stderr

    assert run_featpipe("fit", cwd=root).returncode == 0
    assert "stale" not in run_featpipe("check", cwd=root).stdout
    result = run_featpipe("diff", "--json", cwd=root)
    (fit,) = json.loads(result.stdout)["fitted"]
    moved = {item["term"]: item["changes"] for item in fit["learned"]}
    assert moved["sector_level"][0] == "levels added: whaling"
    # The new edges and knots are numpy's inverted-CDF quantiles of the new training rows.
    both = {key: np.concatenate([np.asarray(data[key]), np.asarray(value)]) for key, value in added.items()}
    before, after = training_frame(data)["income"], training_frame(both)["income"]

    def shown(values):
        return ", ".join(f"{v:.15g}" for v in values)

    edges = [np.unique(np.quantile(frame, [0.25, 0.5, 0.75], method="inverted_cdf")) for frame in (before, after)]
    assert moved["income_band"] == [f"edges moved: {shown(edges[0])} -> {shown(edges[1])}"]
    knots = [np.quantile(frame, [0.05, 0.35, 0.65, 0.95], method="inverted_cdf") for frame in (before, after)]
    assert moved["income_curve"] == [f"knots moved: {shown(knots[0])} -> {shown(knots[1])}"]
    text = run_featpipe("diff", cwd=root).stdout
    assert "learned sector_level: levels added: whaling" in text
    assert "sector_level whaling" in text  # the new level's column, among the coefficients


# --- holdout rows with a level training never saw --------------------------------------------------

def test_holdout_rows_with_an_unseen_level_are_counted_and_left_out_of_the_holdout_metrics(tmp_path):
    rows = lease_rows()
    keys = [key for key in rows["lease_id"] if held_out(int(key))][:3]
    rows["sector"] = np.where(np.isin(rows["lease_id"], keys), "whaling", rows["sector"])
    root, data = lease_project(tmp_path, "SELECT LEVELS(sector, 1) AS sector_level FROM leases\n",
                               ["sector_level", "income"], rows)
    project = api.load_project(root)
    api.fit(project)
    fitted = read_fitted(project.fitted_path("risk"))
    assert "whaling" not in [item["level"] for item in fitted.term("sector_level").learned["levels"]]
    assert fitted.rows["unseen"] == {"sector_level": 3}
    holdout = int(pd.Series(rows["lease_id"]).map(held_out).sum())  # hashlib's split
    assert (fitted.rows["holdout"], fitted.metrics["rows"]) == (holdout, holdout - 3)
    result = scoring.score(project, "risk", table="leases", into="scored")
    assert result.status == {"ok": len(rows["lease_id"]) - 3, "unseen: sector_level": 3}
    assert math.isclose(fitted.metrics["rows"] + 3, fitted.rows["holdout"])
