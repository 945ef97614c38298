"""Group tables (`groups:` in a spec): outcomes read across groups on the holdout and on an evaluated batch.

References outside the project: pandas groupby on the same rows (rows, event rate, mean prediction,
share flagged and its ratios) and scikit-learn's roc_auc_score per group, with the rows scored in
Python from the fitted coefficients and the CSV file (the helpers of tests/test_splits.py). Data are
invented (seeded numpy).
"""

from __future__ import annotations

import hashlib

import pandas as pd
import pytest
from conftest import run_featpipe
from sklearn.metrics import roc_auc_score
from test_splits import SPEC, TERMS, csv_rows, features, loans_project, predicted

from featpipe import api
from featpipe.fitted import read_fitted
from featpipe.fitted.evaluations import read_evaluation
from featpipe.fitted.report import write_report
from featpipe.fitted.report.render import metric_text
from featpipe.project import load_project

GROUPED = SPEC + "threshold: 0.3\ngroups: [region, month_index]\n"


def expected_table(frame: pd.DataFrame, group: str, threshold: float) -> dict:
    """pandas groupby over scored rows (columns y, p and the group): the figures of every group of 30 rows or more."""
    frame = frame.assign(flagged=(frame.p >= threshold).astype(float))
    table = {}
    for label, rows in frame.groupby(frame[group].astype(str)):
        if len(rows) < 30:
            table[label] = {"rows": len(rows), "too_small": True}
            continue
        table[label] = {
            "rows": len(rows), "too_small": False, "events": int(rows.y.sum()), "mean_observed": rows.y.mean(),
            "mean_predicted": rows.p.mean(), "observed_to_predicted": rows.y.sum() / rows.p.sum(),
            "flagged_share": rows.flagged.mean(), "auc": roc_auc_score(rows.y, rows.p),  # scikit-learn per group
        }
    readable = [entry for entry in table.values() if not entry["too_small"]]
    for entry in readable:
        entry["flagged_ratio"] = entry["flagged_share"] / max(e["flagged_share"] for e in readable)
        entry["unflagged_ratio"] = (1 - entry["flagged_share"]) / max(1 - e["flagged_share"] for e in readable)
    return table


def scored_frame(root, rows: list[dict]) -> pd.DataFrame:
    x, y = features(rows)
    frame = pd.DataFrame(rows)
    return frame.assign(y=y, p=predicted(root / "fitted/risk.yaml", x))


def assert_matches(found: list[dict], expected: dict) -> None:
    assert [entry["group"] for entry in found] == sorted(expected)
    for entry in found:
        wanted = expected[entry["group"]]
        assert set(entry) == {"group", *wanted}
        for key, value in wanted.items():
            assert entry[key] == pytest.approx(value, abs=1e-10), (entry["group"], key)


def holdout_rows(root) -> list[dict]:
    """The held-out rows, the spec's hash split recomputed with Python's hashlib: MD5 of "salt:key"."""
    limit = round(0.3 * 16**8)
    return [r for r in csv_rows(root / "data/loans.csv")
            if int(hashlib.md5(f"v1:{r['loan_id']}".encode()).hexdigest()[:8], 16) < limit]


def test_groups_are_tabulated_on_the_holdout_as_pandas_and_scikit_learn_give_them(tmp_path):
    root = loans_project(tmp_path / "loans", GROUPED)
    api.fit(load_project(root))
    fitted = read_fitted(root / "fitted/risk.yaml")
    frame = scored_frame(root, holdout_rows(root))
    assert len(frame) == fitted.rows["holdout"]
    assert_matches(fitted.group_tables["region"], expected_table(frame, "region", 0.3))
    months = fitted.group_tables["month_index"]
    assert_matches(months, expected_table(frame, "month_index", 0.3))
    assert all(entry["too_small"] for entry in months)  # about 15 held-out rows a month: under 30, not read


def test_an_evaluated_batch_gets_the_same_group_table(tmp_path):
    root = loans_project(tmp_path / "loans", GROUPED)
    api.fit(load_project(root))
    result = run_featpipe("evaluate", "risk", "--table", "loans_2026", "-p", str(root))
    assert result.returncode == 0, result.stderr
    evaluation = read_evaluation(root / "fitted/risk.evaluations/loans_2026.yaml")
    frame = scored_frame(root, csv_rows(root / "data/loans_2026.csv"))
    assert_matches(evaluation.group_tables["region"], expected_table(frame, "region", 0.3))
    assert_matches(evaluation.group_tables["month_index"], expected_table(frame, "month_index", 0.3))


def test_check_refuses_a_group_column_a_term_reads(tmp_path):
    root = loans_project(tmp_path / "loans", SPEC + "groups: [region, income]\n")
    result = run_featpipe("check", "-p", str(root))
    assert result.returncode == 1
    # each term is placed where its name is written in the one-line term file
    debt_ratio, income_k = TERMS.index("AS debt_ratio") + 4, TERMS.index("AS income_k") + 4
    assert (f"specs/risk.yaml:5:18: group column 'income' is read by term 'debt_ratio' (terms/loans.sql:1:{debt_ratio}); "
            "a group is reported, never modelled: remove the term from the model or the column from groups") in result.stderr
    assert f"term 'income_k' (terms/loans.sql:1:{income_k})" in result.stderr
    assert "Traceback" not in result.stderr


@pytest.mark.parametrize("groups, message", [
    ("[regoin]", "specs/risk.yaml:5:10: group column 'regoin' is not a column of input 'loans'"),
    ("[defaulted]", "specs/risk.yaml:5:10: 'defaulted' is the model's target; it cannot also be a group column"),
    ("region", "specs/risk.yaml:5:9: groups must be a list of input column names, e.g. [region]"),
])
def test_check_refuses_groups_it_cannot_tabulate(tmp_path, groups, message):
    root = loans_project(tmp_path / "loans", SPEC + f"groups: {groups}\n")
    result = run_featpipe("check", "-p", str(root))
    assert result.returncode == 1
    assert message in result.stderr


def test_the_group_table_is_validated_when_the_fitted_file_is_read(tmp_path):
    root = loans_project(tmp_path / "loans", GROUPED)
    api.fit(load_project(root))
    path = root / "fitted/risk.yaml"
    first = path.read_bytes()
    api.fit(load_project(root))
    assert path.read_bytes() == first  # deterministic
    path.write_text(first.decode().replace("too_small: false", "too_small: maybe", 1))
    result = run_featpipe("explain", "risk", "-p", str(root))
    assert result.returncode == 1
    assert "group_tables.region[0].too_small must be true or false" in result.stderr


def test_the_report_shows_the_group_table_with_its_cautions(tmp_path):
    root = loans_project(tmp_path / "loans", GROUPED)
    project = load_project(root)
    api.fit(project)
    run_featpipe("evaluate", "risk", "--table", "loans_2026", "-p", str(root))
    page = write_report(project, "risk").read_text()
    assert "Outcomes across groups" in page
    assert "too small to read" in page
    assert "calls for review" in page and "does not prove" in page
    assert "Local law and the organisation" in page
    assert "29 CFR 1607.4(D)" in page
    assert "region on the table loans_2026" in page and "month_index on the held-out rows" in page
    fitted = read_fitted(root / "fitted/risk.yaml")
    for entry in fitted.group_tables["region"]:
        assert f'<td class="num">{metric_text(entry["auc"])}</td>' in page
        review = min(entry["flagged_ratio"], entry["unflagged_ratio"]) < 0.8
        assert (f'<td>{entry["group"]} (review)</td>' in page) == review


@pytest.mark.parametrize("kind", ["postgres", pytest.param("spark", marks=pytest.mark.spark)])
def test_group_tables_and_input_profiles_are_the_same_on_every_engine(tmp_path, request, kind):
    from test_splits import PROJECT, assert_close, engine_block

    reference = loans_project(tmp_path / "duckdb", GROUPED)
    api.fit(load_project(reference))
    api.evaluate(load_project(reference), "risk", "loans_2026")
    root = loans_project(tmp_path / kind, GROUPED)
    (root / "featpipe.yaml").write_text(PROJECT.replace("{kind: duckdb, path: build/loans.duckdb}", engine_block(kind, request)))
    api.fit(load_project(root))
    api.evaluate(load_project(root), "risk", "loans_2026")
    # DuckDB's run, which the tests above check against pandas and scikit-learn, is the reference.
    mine, theirs = read_fitted(root / "fitted/risk.yaml"), read_fitted(reference / "fitted/risk.yaml")
    assert_close(mine.group_tables, theirs.group_tables, "group_tables")
    assert_close(mine.input_profiles, theirs.input_profiles, "input_profiles")
    evaluated = [read_evaluation(path / "fitted/risk.evaluations/loans_2026.yaml") for path in (root, reference)]
    assert_close(evaluated[0].group_tables, evaluated[1].group_tables, "evaluation group_tables")


def test_a_ratio_below_four_fifths_is_marked_for_review_and_small_groups_are_not_read():
    from featpipe.fitted.report.groups import _row
    from featpipe.fitting.groups import read_groups

    # Worked by hand: group a flags 20 of 100 rows (0.2), b 10 of 100 (0.1), c has 29 rows (too small).
    # flagged ratio: a 0.2 / 0.2 = 1, b 0.1 / 0.2 = 0.5 (below 0.8, 29 CFR 1607.4(D)); not-flagged: a 0.8 / 0.9.
    # AUC of a (Mann-Whitney): twice the events' rank sum 1000, 10 events and 90 non-events: (1000 - 10 * 11) / (2 * 900).
    found = read_groups([("b", 100, 10.0, 12.0, 10, 1300), ("a", 100, 10.0, 10.0, 20, 1000), ("c", 29, 3.0, 3.0, 9, 100)],
                        "binomial")
    assert [entry["group"] for entry in found] == ["a", "b", "c"]
    a, b, c = found
    assert (a["flagged_ratio"], b["flagged_ratio"]) == (1.0, 0.5)
    assert a["unflagged_ratio"] == pytest.approx(0.8 / 0.9) and b["unflagged_ratio"] == 1.0
    assert a["auc"] == pytest.approx((1000 - 110) / 1800) and b["observed_to_predicted"] == pytest.approx(10 / 12)
    assert c == {"group": "c", "rows": 29, "too_small": True}
    assert [_row(entry)[2] for entry in found] == [False, True, False]
    assert _row(c)[1] == ("29", "too small to read")
