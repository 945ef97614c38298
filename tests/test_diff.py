"""`featpipe diff` in real git repositories: each kind of edit reported in text, Markdown and JSON.

The outside reference is git itself: the project is committed with the git command line, edited in
the working tree, and the diff must read the committed side through git without changing the
working tree (`git status` is the same before and after). Expected lines are worked by hand from
the edit each test makes.
"""

from __future__ import annotations

import os
import subprocess
from pathlib import Path

import pytest
from conftest import MODEL_YAML, write_project

from featpipe.api import check_report
from featpipe.compiler import compile_project
from featpipe.errors import FeatpipeError
from featpipe.fitted import INTERCEPT, FittedModel, FittedTerm, write_fitted
from featpipe.project import load_project
from featpipe.review.diff import diff_project
from featpipe.review.formats import render_markdown, render_text

PRICE_SQL = """\
SELECT
  -- Orders whose items cost more than 50 each.
  CASE WHEN item_price > 50 THEN 1 ELSE 0 END AS pricey
FROM orders
"""
MODEL_WITH_PRICEY = MODEL_YAML.replace("[item_price, northern, items]", "[item_price, northern, items, pricey]")
# The environment of an outer git hook must not leak into the test repositories.
GIT_ENVIRONMENT = {key: value for key, value in os.environ.items() if not key.startswith("GIT_")}


def git(folder: Path, *args: str) -> str:
    done = subprocess.run(["git", *args], cwd=folder, capture_output=True, text=True, env=GIT_ENVIRONMENT, check=True)
    return done.stdout


def fitted_model(project: Path, estimates: dict[str, tuple[float, float, float]], auc: float = 0.7,
                 train: int = 6) -> FittedModel:
    """A small hand-made fitted file matching the project's current `returns` model."""
    model = compile_project(load_project(project)).models["returns"]
    terms = [FittedTerm(INTERCEPT, *_numbers(estimates[INTERCEPT]))]
    terms += [FittedTerm(term.name, *_numbers(estimates[term.name]), fingerprint=term.fingerprint, sql=term.sql,
                         kind=term.kind) for term in model.terms]
    return FittedModel(
        model="returns", fingerprint=model.fingerprint, input="orders", key="order_id", target="returned",
        family="binomial", link="logit", offset=None, weights=None, holdout={"fraction": 0.3, "salt": "v1"},
        threshold=0.5, penalty={"l2": 0.0, "l1": 0.0},
        columns={"order_id": "BIGINT", "amount": "DOUBLE", "items": "BIGINT", "region": "VARCHAR"},
        rows={"input": 8, "complete": 7, "train": train, "holdout": 7 - train, "dropped": {"null term item_price": 1}},
        fit={"converged": True, "iterations": 5, "deviance": 7.5, "aic": 15.5},
        terms=tuple(terms),
        metrics={"rows": 7 - train, "auc": auc, "calibration": [{"decile": 1, "rows": 1, "mean_predicted": auc / 2}]},
        depends_on=model.dependencies,
    )


def _numbers(values: tuple[float, float, float]) -> tuple:
    estimate, low, high = values
    return estimate, (high - low) / 3.92, estimate / ((high - low) / 3.92), 0.05, low, high


FIT = {INTERCEPT: (-1.5, -2.5, -0.5), "item_price": (0.02, 0.01, 0.03), "northern": (0.4, -0.2, 1.0),
       "items": (0.3, 0.1, 0.5), "pricey": (0.5, 0.1, 0.9)}


def committed_project(tmp_path: Path, files: dict[str, str] | None = None, fit: bool = True) -> Path:
    """A repository holding the small project in a subfolder, committed on main, with its fit."""
    top = tmp_path / "repo"
    project = write_project(top / "analytics" / "shop", files)
    if fit:
        write_fitted(project / "fitted" / "returns.yaml", fitted_model(project, FIT))
    git(top, "init", "--quiet", "--initial-branch=main")
    git(top, "config", "user.name", "Test Author")
    git(top, "config", "user.email", "author@example.invalid")
    git(top, "config", "commit.gpgsign", "false")
    git(top, "add", ".")
    git(top, "commit", "--quiet", "-m", "Add the shop project")
    return project


def edit(project: Path, relative: str, old: str, new: str) -> None:
    path = project / relative
    text = path.read_text(encoding="utf-8")
    assert old in text
    path.write_text(text.replace(old, new), encoding="utf-8")


def diff_all(project: Path, since: str | None = None):
    """The diff in its three forms, checking that computing it left git's view of the tree alone."""
    before = git(project, "status", "--porcelain")
    change = diff_project(project, since)
    assert git(project, "status", "--porcelain") == before
    return change, render_text(change).splitlines(), render_markdown(change).splitlines(), change.as_dict()


def test_whitespace_only_edit_is_text_not_meaning(tmp_path):
    project = committed_project(tmp_path)
    edit(project, "terms/basket.sql", "amount / NULLIF(items, 0) AS item_price", "amount/NULLIF(items,0)\n    AS item_price")
    change, text, markdown, data = diff_all(project)

    short = change.since.short
    assert text[0] == f"featpipe diff: project shop, working tree against merge base with main ({short})"
    assert "  text changed  item_price  terms/basket.sql:5  same meaning; layout changed; in models: returns" in text
    assert "| text changed | `item_price` | `terms/basket.sql:5` | same meaning; layout changed; in models: `returns` |" in markdown
    (term,) = data["terms"]
    assert term["change"] == "text" and term["aspects"] == ["whitespace"]
    assert (term["old_text"], term["new_text"]) == ("amount / NULLIF(items, 0) AS item_price",
                                                    "amount/NULLIF(items,0)\n    AS item_price")
    assert (term["old_line"], term["line"]) == (4, 5)
    assert data["models"] == [] and data["stale"] == [] and data["left_stale"] == [] and data["fitted"] == []
    assert git(project, "status", "--porcelain") == " M analytics/shop/terms/basket.sql\n"


def test_comment_edits_are_text_changes(tmp_path):
    project = committed_project(tmp_path)
    edit(project, "terms/basket.sql", "-- Average price of one item.", "-- Mean price of one item, in currency units.")
    edit(project, "terms/basket.sql", "CASE WHEN region = 'north' THEN 1 ELSE 0 END",
         "CASE WHEN region = 'north' /* the northern warehouse */ THEN 1 ELSE 0 END")
    change, text, markdown, data = diff_all(project)

    assert "  text changed  item_price  terms/basket.sql:4  same meaning; doc changed; in models: returns" in text
    assert "  text changed  northern  terms/basket.sql:5  same meaning; inline comments changed; in models: returns" in text
    assert "| text changed | `northern` | `terms/basket.sql:5` | same meaning; inline comments changed; in models: `returns` |" in markdown
    by_name = {term["name"]: term for term in data["terms"]}
    assert by_name["item_price"]["aspects"] == ["doc"]
    assert (by_name["item_price"]["old_doc"], by_name["item_price"]["new_doc"]) == (
        "Average price of one item.", "Mean price of one item, in currency units.")
    assert by_name["northern"]["aspects"] == ["comment"]
    assert data["stale"] == [] and data["edited_files"] == []


def test_moving_a_term_to_another_file_keeps_its_meaning(tmp_path):
    project = committed_project(tmp_path)
    edit(project, "terms/basket.sql", "  CASE WHEN region = 'north' THEN 1 ELSE 0 END AS northern\n", "")
    edit(project, "terms/basket.sql", "AS item_price,", "AS item_price")
    (project / "terms" / "where.sql").write_text("SELECT\n  CASE WHEN region = 'north' THEN 1 ELSE 0 END AS northern\nFROM orders\n")
    change, text, markdown, data = diff_all(project)

    assert "  text changed  northern  terms/where.sql:2  same meaning; moved from terms/basket.sql; in models: returns" in text
    assert "| text changed | `northern` | `terms/where.sql:2` | same meaning; moved from terms/basket.sql; in models: `returns` |" in markdown
    (term,) = data["terms"]
    assert term["aspects"] == ["file"] and (term["old_file"], term["old_line"]) == ("terms/basket.sql", 5)
    assert data["stale"] == [] and data["edited_files"] == []


def test_file_comment_edit_changes_no_term(tmp_path):
    project = committed_project(tmp_path)
    edit(project, "terms/basket.sql", "-- Terms about the basket.", "-- Terms about the basket and where it goes.")
    change, text, markdown, data = diff_all(project)

    assert data["terms"] == [] and data["edited_files"] == ["terms/basket.sql"]
    assert "  file edited  terms/basket.sql  no term changed" in text
    assert "| file edited |  | `terms/basket.sql` | no term changed |" in markdown
    assert not change.unchanged and change.left_stale == ()


def test_semantic_edit_reports_both_sqls_and_the_stale_fit(tmp_path):
    project = committed_project(tmp_path)
    edit(project, "terms/basket.sql", "amount / NULLIF(items, 0) AS", "amount / NULLIF(items, 0) * 100 AS")
    change, text, markdown, data = diff_all(project)

    old_sql, new_sql = '"amount" / NULLIF("items", 0)', '"amount" / NULLIF("items", 0) * 100'
    assert text[text.index("Terms") + 1:text.index("Terms") + 4] == [
        "  meaning changed  item_price  terms/basket.sql:4  changed directly; in models: returns",
        f"      before  {old_sql}",
        f"      now     {new_sql}",
    ]
    assert "  returns  terms changed meaning: item_price" in text
    assert "  fitted/returns.yaml  term 'item_price' changed meaning; left stale by this change" in text
    assert "- `fitted/returns.yaml`: term 'item_price' changed meaning; left stale by this change" in markdown
    assert text[-1] == "1 fitted model left stale by this change (returns): run `featpipe fit` and commit the fitted files"
    assert "| meaning changed | `item_price` | `terms/basket.sql:4` | changed directly; in models: `returns` |" in markdown
    assert f"| `item_price` | `{old_sql}` | `{new_sql}` |" in markdown
    assert "**1 fitted model left stale by this change (returns): run `featpipe fit` and commit the fitted files**" in markdown
    (term,) = data["terms"]
    assert term["change"] == "meaning" and term["direct"] is True and term["through"] == []
    assert (term["old_sql"], term["new_sql"]) == (old_sql, new_sql) and term["old_fingerprint"] != term["new_fingerprint"]
    assert data["models"] == [{"name": "returns", "change": "changed", "terms_added": [], "terms_removed": [],
                               "terms_changed": ["item_price"], "spec_changed": []}]
    assert data["stale"] == [{"model": "returns", "file": "fitted/returns.yaml",
                              "reasons": ["term 'item_price' changed meaning"], "caused_by_change": True}]
    assert data["left_stale"] == ["returns"]


def test_a_spec_only_edit_leaves_the_fit_stale_for_the_same_reason_check_gives(tmp_path):
    project = committed_project(tmp_path)
    edit(project, "specs/returns.yaml", "family: binomial\n", "family: binomial\nthreshold: 0.3\n")
    _, text, _, data = diff_all(project)

    reason = "threshold changed from 0.5 to 0.3"  # 0.5 is the default threshold
    assert data["terms"] == []
    assert data["models"] == [{"name": "returns", "change": "changed", "terms_added": [], "terms_removed": [],
                               "terms_changed": [], "spec_changed": ["threshold"]}]
    assert data["stale"] == [{"model": "returns", "file": "fitted/returns.yaml", "reasons": [reason],
                              "caused_by_change": True}]
    assert data["left_stale"] == ["returns"]
    assert "  returns  spec changed: threshold" in text
    assert f"  fitted/returns.yaml  {reason}; left stale by this change" in text
    assert check_report(load_project(project)).stale == (f"fitted/returns.yaml is stale: {reason}",)


def test_edit_of_a_used_term_changes_the_user_through_it(tmp_path):
    project = committed_project(tmp_path, {"terms/price.sql": PRICE_SQL, "specs/returns.yaml": MODEL_WITH_PRICEY})
    edit(project, "terms/basket.sql", "NULLIF(items, 0)", "NULLIF(items + 1, 0)")
    change, text, markdown, data = diff_all(project)

    assert "  meaning changed  item_price  terms/basket.sql:4  changed directly; in models: returns" in text
    assert "  meaning changed  pricey  terms/price.sql:3  changed through item_price; in models: returns" in text
    assert ('      now     CASE WHEN "amount" / NULLIF("items" + 1, 0) > 50 THEN 1 ELSE 0 END') in text
    assert "| meaning changed | `pricey` | `terms/price.sql:3` | changed through `item_price`; in models: `returns` |" in markdown
    pricey = next(term for term in data["terms"] if term["name"] == "pricey")
    assert pricey["direct"] is False and pricey["through"] == ["item_price"]
    assert pricey["old_sql"] == 'CASE WHEN "amount" / NULLIF("items", 0) > 50 THEN 1 ELSE 0 END'
    assert data["models"][0]["terms_changed"] == ["item_price", "pricey"]
    assert data["stale"][0]["reasons"] == ["term 'item_price' changed meaning", "term 'pricey' changed meaning"]


def test_rename_is_one_term_with_the_same_fingerprint(tmp_path):
    project = committed_project(tmp_path)
    edit(project, "terms/basket.sql", "AS item_price", "AS price_each")
    edit(project, "specs/returns.yaml", "[item_price,", "[price_each,")
    change, text, markdown, data = diff_all(project)

    assert "  renamed  item_price -> price_each  terms/basket.sql:4  same meaning; in models: returns" in text
    assert "  returns  terms added: price_each; terms removed: item_price" in text
    assert "| renamed | `item_price` -> `price_each` | `terms/basket.sql:4` | same meaning; in models: `returns` |" in markdown
    (term,) = data["terms"]
    assert {key: term[key] for key in ("change", "old_name", "name", "old_line", "line")} == {
        "change": "renamed", "old_name": "item_price", "name": "price_each", "old_line": 4, "line": 4}
    assert data["stale"][0]["reasons"] == ["term 'price_each' was added", "term 'item_price' was removed"]
    assert data["left_stale"] == ["returns"]


def test_removal_names_the_models_it_was_in(tmp_path):
    project = committed_project(tmp_path)
    edit(project, "terms/basket.sql", "amount / NULLIF(items, 0) AS item_price,", "amount / NULLIF(items, 0) AS item_price")
    edit(project, "terms/basket.sql", "  CASE WHEN region = 'north' THEN 1 ELSE 0 END AS northern\n", "")
    edit(project, "specs/returns.yaml", "northern, ", "")
    change, text, markdown, data = diff_all(project)

    short = change.since.short
    assert f"  removed  northern  terms/basket.sql:5 (at {short})  was in models: returns" in text
    assert f"| removed | `northern` | `terms/basket.sql:5 (at {short})` | was in models: `returns` |" in markdown
    (term,) = data["terms"]
    assert term == {"change": "removed", "name": "northern", "file": "terms/basket.sql", "line": 5,
                    "sql": "CASE WHEN \"region\" = 'north' THEN 1 ELSE 0 END", "fingerprint": term["fingerprint"],
                    "models": ["returns"]}
    assert data["models"][0]["terms_removed"] == ["northern"]
    assert data["stale"][0]["reasons"] == ["term 'northern' was removed"]


def test_refit_calls_out_sign_flips_and_moves_outside_the_old_interval(tmp_path):
    project = committed_project(tmp_path)
    # item_price: 0.02 [0.01, 0.03] -> -0.01 (sign flip, below 0.01); items: 0.3 [0.1, 0.5] -> 0.7 (above 0.5);
    # northern: 0.4 [-0.2, 1.0] -> 0.5 (inside); the intercept does not move.
    refit = {**FIT, "item_price": (-0.01, -0.02, 0.0), "items": (0.7, 0.5, 0.9), "northern": (0.5, -0.1, 1.1)}
    write_fitted(project / "fitted" / "returns.yaml", fitted_model(project, refit, auc=0.75, train=5))
    change, text, markdown, data = diff_all(project)

    assert data["terms"] == [] and data["stale"] == [] and data["left_stale"] == []
    assert text[text.index("Fitted files") + 1:] == [
        "  fitted/returns.yaml  refitted",
        "    (intercept)  -1.5 [-2.5, -0.5] -> -1.5 [-2.5, -0.5]",
        "    item_price   0.02 [0.01, 0.03] -> -0.01 [-0.02, 0]  sign flipped; outside the old 95% interval",
        "    northern     0.4 [-0.2, 1] -> 0.5 [-0.1, 1.1]",
        "    items        0.3 [0.1, 0.5] -> 0.7 [0.5, 0.9]  outside the old 95% interval",
        "    rows.train: 6 -> 5 (-1)",
        "    rows.holdout: 1 -> 2 (+1)",
        "    metrics.rows: 1 -> 2 (+1)",
        "    metrics.auc: 0.7 -> 0.75 (+0.05)",
        "    metrics.calibration: 1 value changed (see --json)",
    ]
    assert "| `item_price` | 0.02 [0.01, 0.03] | -0.01 [-0.02, 0] | **sign flipped**, **outside the old 95% interval** |" in markdown
    assert "| `items` | 0.3 [0.1, 0.5] | 0.7 [0.5, 0.9] | **outside the old 95% interval** |" in markdown
    assert "| `metrics.auc` | 0.7 | 0.75 | +0.05 |" in markdown
    (fit,) = data["fitted"]
    assert fit["change"] == "changed"
    coefficients = {item["name"]: item for item in fit["coefficients"]}
    assert coefficients["item_price"]["old"]["ci_low"] == 0.01 and coefficients["item_price"]["new"]["estimate"] == -0.01
    assert [(name, item["sign_flipped"], item["outside_old_interval"]) for name, item in coefficients.items()] == [
        (INTERCEPT, False, False), ("item_price", True, True), ("northern", False, False), ("items", False, True)]
    assert fit["metrics"][1] == {"path": "auc", "old": 0.7, "new": 0.75, "delta": pytest.approx(0.05)}
    assert fit["metrics"][2] == {"path": "calibration[0].mean_predicted", "old": 0.35, "new": 0.375,
                                 "delta": pytest.approx(0.025)}
    assert fit["rows"][0] == {"path": "train", "old": 6, "new": 5, "delta": -1}


def test_a_fit_already_stale_at_the_revision_is_not_this_changes_doing(tmp_path):
    project = committed_project(tmp_path)
    edit(project, "terms/basket.sql", "NULLIF(items, 0)", "NULLIF(items, 1)")
    git(project, "commit", "--quiet", "-am", "Divide by one item at least, without refitting")
    edit(project, "terms/basket.sql", "-- Terms about the basket.", "-- Terms about an order's basket.")
    change, text, markdown, data = diff_all(project, since="HEAD")

    short = change.since.short
    assert data["stale"] == [{"model": "returns", "file": "fitted/returns.yaml",
                              "reasons": ["term 'item_price' changed meaning"], "caused_by_change": False}]
    assert data["left_stale"] == [] and change.left_stale == ()
    assert f"  fitted/returns.yaml  term 'item_price' changed meaning; already stale at {short}" in text
    assert f"- `fitted/returns.yaml`: term 'item_price' changed meaning; already stale at {short}" in markdown
    assert not any(line.startswith("**") for line in markdown)  # no stale banner: this change is not to blame


def test_default_revision_is_the_merge_base_with_main(tmp_path):
    project = committed_project(tmp_path)
    base = git(project, "rev-parse", "HEAD").strip()
    git(project, "switch", "--quiet", "-c", "feature")
    edit(project, "terms/basket.sql", "NULLIF(items, 0)", "NULLIF(items, 1)")
    git(project, "commit", "--quiet", "-am", "Divide by one item at least")

    branch_change = diff_project(project)
    assert branch_change.since.commit == base and branch_change.since.label == "merge base with main"
    assert [term.name for term in branch_change.terms] == ["item_price"]
    assert diff_project(project, since="HEAD").unchanged  # the edit is committed: nothing since HEAD
    assert render_text(diff_project(project, since="HEAD")).splitlines()[1] == "no change in terms, models or fitted files"


def test_a_project_absent_at_the_revision_is_all_new(tmp_path):
    project = committed_project(tmp_path, fit=False)
    other = write_project(project.parent / "second")
    data = diff_project(other).as_dict()
    assert [(term["change"], term["name"]) for term in data["terms"]] == [("added", "item_price"), ("added", "northern")]
    assert data["models"] == [{"name": "returns", "change": "added", "terms_added": [], "terms_removed": [],
                               "terms_changed": [], "spec_changed": []}]


def test_unknown_revision_and_missing_repository_are_clear_errors(tmp_path):
    project = committed_project(tmp_path)
    with pytest.raises(FeatpipeError, match=r"unknown revision 'no-such-branch'; pass --since a commit, branch or tag"):
        diff_project(project, since="no-such-branch")
    outside = write_project(tmp_path / "loose")
    with pytest.raises(FeatpipeError, match=r"is not inside a git repository"):
        diff_project(outside)


def test_a_revision_that_does_not_compile_is_reported_with_its_position(tmp_path):
    project = committed_project(tmp_path, {"terms/bad.sql": "SELECT\n  amonut AS typo\nFROM orders\n"}, fit=False)
    short = git(project, "rev-parse", "--short=7", "HEAD").strip()
    (project / "terms" / "bad.sql").unlink()
    with pytest.raises(FeatpipeError) as raised:
        diff_project(project)
    message = str(raised.value)
    assert message.startswith(f"the project at merge base with main ({short}) does not load")
    assert f"  {short}:analytics/shop/terms/bad.sql:2:3: " in message


def test_an_unreadable_fitted_file_at_the_revision_is_reported_not_fatal(tmp_path):
    project = committed_project(tmp_path, {"fitted/returns.yaml": "model: returns\n"}, fit=False)
    write_fitted(project / "fitted" / "returns.yaml", fitted_model(project, FIT))
    change, text, markdown, data = diff_all(project)

    (fit,) = data["fitted"]
    assert fit["change"] == "unreadable" and fit["problem"].startswith("fitted/returns.yaml at the revision: not a fitted file")
    assert any(line.startswith("  fitted/returns.yaml  could not be read: fitted/returns.yaml at the revision:") for line in text)
    assert data["stale"] == []  # the file now matches the model


def test_an_unreadable_fitted_file_now_is_reported_not_fatal(tmp_path):
    """A fitted file broken in the working tree is one `unreadable` fit and one stale fit, not an abort."""
    project = committed_project(tmp_path)
    (project / "fitted" / "returns.yaml").write_text("model: returns\n")
    _, text, _, data = diff_all(project)

    (fit,) = data["fitted"]
    assert fit["change"] == "unreadable" and fit["problem"].startswith("fitted/returns.yaml: not a fitted file")
    (stale,) = data["stale"]
    assert stale["model"] == "returns" and stale["reasons"][0].startswith("it cannot be read (fitted/returns.yaml: not a fitted file")
    assert any(line.startswith("  fitted/returns.yaml  could not be read: fitted/returns.yaml:") for line in text)
