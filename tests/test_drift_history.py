"""`featpipe drift --history PERIOD`: one row per batch in fitted/MODEL.drift.yaml, in time order,
deterministic, written atomically, validated when read, and drawn in the report.

References outside the project: each row's score PSI against numpy on the training bins
(tests/test_drift.py's numpy_psis over term values computed by pandas). Batches are the invented ones of
tests/test_input_drift.py (its `lease` fixture: the demo fitted afresh, batches fresh, gaps and tail).
"""

from __future__ import annotations

import os

import pytest
import yaml
from conftest import run_featpipe
from test_drift import numpy_psis
from test_input_drift import MODEL, lease  # noqa: F401 (the fixture)

from featpipe.fitted import read_fitted
from featpipe.fitted.drift import drift
from featpipe.fitted.drift_history import append_history, history_path
from featpipe.fitted.report import write_report
from featpipe.project import load_project


def history_file(root):
    path = history_path(root / "fitted" / f"{MODEL}.yaml")
    path.unlink(missing_ok=True)
    return path


def record(root, table: str, period: str):
    result = run_featpipe("drift", MODEL, "--table", table, "--history", period, "-p", str(root))
    assert result.returncode == 0, result.stderr
    return result


def test_rows_are_kept_in_time_order_with_the_psi_numpy_gives(lease):  # noqa: F811
    root, frames = lease
    path = history_file(root)
    for table, period in (("tail", "2026-07"), ("fresh", "2026-05"), ("gaps", "2026-06")):
        assert f"added {period} to" in record(root, table, period).stdout
    rows = yaml.safe_load(path.read_text())["rows"]
    assert [(row["period"], row["table"]) for row in rows] == [("2026-05", "fresh"), ("2026-06", "gaps"), ("2026-07", "tail")]
    fitted = read_fitted(root / "fitted" / f"{MODEL}.yaml")
    for row in rows:
        # numpy on the training bins, the rows of the batch's CSV file
        assert row["score_psi"] == pytest.approx(numpy_psis(frames[row["table"]], fitted)["linear_predictor"], rel=1e-9)
    # The gaps batch's 3% unseen sectors get no score (the sector is a LEVELS term without `other`): a moderate shift.
    assert [row["score_reading"] for row in rows] == ["stable", "moderate shift", "major shift"]
    assert rows[1]["largest_unseen"] > 0.02 and rows[0]["largest_unseen"] == 0.0


def test_the_file_is_the_same_whatever_order_the_batches_ran_in_and_a_period_run_again_replaces_its_row(lease):  # noqa: F811
    root, _ = lease
    path = history_file(root)
    for table, period in (("fresh", "2026-05"), ("gaps", "2026-06")):
        record(root, table, period)
    in_order = path.read_bytes()
    path.unlink()
    for table, period in (("gaps", "2026-06"), ("tail", "2026-05"), ("fresh", "2026-05")):
        record(root, table, period)
    assert path.read_bytes() == in_order


def test_a_run_killed_while_writing_leaves_the_history_as_it_was(lease, monkeypatch):  # noqa: F811
    root, _ = lease
    path = history_file(root)
    record(root, "fresh", "2026-05")
    before = path.read_bytes()
    report = drift(load_project(root), MODEL, "tail")

    def killed(*_):
        raise KeyboardInterrupt  # the process stopped between writing the new text and renaming it

    monkeypatch.setattr(os, "replace", killed)
    with pytest.raises(KeyboardInterrupt):
        append_history(path, report, "2026-06", "0" * 16)
    assert path.read_bytes() == before
    assert sorted(p.name for p in path.parent.iterdir() if p.name.startswith(".")) == []  # no temporary file left


@pytest.mark.parametrize("edit, message", [
    (lambda text: text.replace("score_psi: ", "score_psi: high # ", 1), "rows[0].score_psi must be a finite number"),
    (lambda text: text.replace("2026-05", "2026-09", 1), "the rows are not in time order, one per period"),
    (lambda text: text.replace("rows:", "rows: [", 1), "not a drift history featpipe can read (YAML error at line "),
])
def test_a_history_edited_by_hand_is_refused_with_the_file_named(lease, edit, message):  # noqa: F811
    root, _ = lease
    path = history_file(root)
    record(root, "fresh", "2026-05")
    record(root, "gaps", "2026-06")
    path.write_text(edit(path.read_text()))
    before = path.read_bytes()
    result = run_featpipe("drift", MODEL, "--table", "tail", "--history", "2026-07", "-p", str(root))
    assert result.returncode == 1
    assert f"fitted/{MODEL}.drift.yaml: " in result.stderr and message in result.stderr
    assert "Traceback" not in result.stderr
    assert path.read_bytes() == before


def test_a_period_that_is_not_a_month_or_a_day_is_refused_before_anything_runs(lease):  # noqa: F811
    root, _ = lease
    path = history_file(root)
    result = run_featpipe("drift", MODEL, "--table", "fresh", "--history", "June", "-p", str(root))
    assert result.returncode == 1
    assert "--history June: give the batch's period as a month like 2026-06 or a day like 2026-06-30" in result.stderr
    assert not path.exists()


def test_the_report_draws_the_history(lease):  # noqa: F811
    root, _ = lease
    history_file(root)
    for table, period in (("fresh", "2026-05"), ("gaps", "2026-06"), ("tail", "2026-07")):
        record(root, table, period)
    page = write_report(load_project(root), MODEL).read_text()
    section = page[page.index('<section id="drift-history">'):page.index('<section id="cautions">')]
    assert "<svg" in section and "Drift over time" in section
    assert [period for period in ("2026-05", "2026-06", "2026-07") if f"<td>{period}</td>" in section] == ["2026-05", "2026-06", "2026-07"]
    assert section.index("<td>2026-05</td>") < section.index("<td>2026-06</td>") < section.index("<td>2026-07</td>")
    assert "major shift" in section
