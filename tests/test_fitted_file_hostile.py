"""A fitted file is untrusted input: hand edits and hostile values are refused before any of it is used.

A fitted file is reviewed and committed like code, and the scoring SQL exported from it is scheduled by
people who never run featpipe. Each case edits fitted/default_risk.yaml of a copy of the lease demo as
a person could (through YAML, or byte by byte), then runs the four commands that read it. Each must
exit 1 with one line naming the file and the key, change no table of the project's database, and
print no SQL that could run anything but the scoring SELECT: whatever `sql` printed is run on a
scratch DuckDB database holding a copy of the leases table, which must still be there afterwards.
"""

from __future__ import annotations

import shutil
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path

import duckdb
import pytest
import yaml
from conftest import DEMOS, copy_demo, table_row_counts
from conftest import run_featpipe as run

from featpipe.fitted import read_fitted
from featpipe.fitted.drift import drift_header
from featpipe.fitted.scoring import score_header
from featpipe.project.names import NAME_RULE

MODEL = "default_risk"
SOURCE = f"fitted/{MODEL}.yaml"
LEASE_ROWS = 5000  # rows of projects/lease_default/data/leases.csv
INJECTION = "\nDROP TABLE leases; --"
# terms[2] of the demo fit is young_firm, terms[1] payment_to_revenue (the order of specs/default_risk.yaml).
YOUNG_FIRM = 2


def in_data(change: Callable[[dict], object]) -> Callable[[bytes], bytes]:
    """An edit of the file's YAML data, written back as YAML (as an editor that reformats would)."""
    def edit(raw: bytes) -> bytes:
        data = yaml.safe_load(raw.decode("utf-8"))
        change(data)
        return yaml.safe_dump(data, sort_keys=False, allow_unicode=True, width=100).encode("utf-8")
    return edit


def young_firm(data: dict) -> dict:
    term = data["terms"][YOUNG_FIRM]
    assert term["name"] == "young_firm"
    return term


def setting(*path, value) -> Callable[[bytes], bytes]:
    """Set data[path[0]][path[1]]... to `value`; an int in the path indexes a list."""
    def change(data: dict) -> None:
        place = data
        for key in path[:-1]:
            place = place[key]
        place[path[-1]] = value
    return in_data(change)


def edited_by_hand(what: str) -> str:
    return f"{SOURCE} was edited by hand: {what}; run featpipe fit"


def refused(path: str, rule: str, value: str) -> str:
    return f"{SOURCE}: {path} {rule}, not {value}; run featpipe fit again"


A_NAME = NAME_RULE
A_NUMBER = "must be a finite number"

CASES = {
    # Injection: a line break in a value that reaches the scoring SQL.
    "newline in link": (setting("link", value="logit" + INJECTION),
                        refused("link", "must be one of logit, log, identity", repr("logit" + INJECTION))),
    "newline in family": (setting("family", value="binomial" + INJECTION),
                          refused("family", "must be one of binomial, poisson, gaussian, gamma, tweedie, quasipoisson, quasibinomial", repr("binomial" + INJECTION))),
    "newline in a term name": (setting("terms", YOUNG_FIRM, "name", value="young_firm" + INJECTION),
                               refused("terms[2].name", A_NAME, repr("young_firm" + INJECTION))),
    "newline in the model name": (setting("model", value=MODEL + INJECTION), refused("model", A_NAME, repr(MODEL + INJECTION))),
    "newline in the input": (setting("input", value="leases" + INJECTION), refused("input", A_NAME, repr("leases" + INJECTION))),
    "newline in the key": (setting("key", value="lease_id" + INJECTION), refused("key", A_NAME, repr("lease_id" + INJECTION))),
    "statement as a column type": (setting("columns", "sector", value="VARCHAR); DROP TABLE leases; --"),
                                   refused("columns.sector", "must be a SQL type such as DOUBLE or VARCHAR",
                                           repr("VARCHAR); DROP TABLE leases; --"))),
    "list as the model name": (setting("model", value=["a", "b"]), refused("model", A_NAME, "a list")),
    # Numbers that are not finite numbers.
    "NaN estimate": (setting("terms", YOUNG_FIRM, "estimate", value=float("nan")),
                     refused("terms[2].estimate", A_NUMBER, "'nan'")),
    "infinite estimate": (setting("terms", YOUNG_FIRM, "estimate", value=float("-inf")),
                          refused("terms[2].estimate", A_NUMBER, "'-inf'")),
    "text estimate": (setting("terms", YOUNG_FIRM, "estimate", value="0.5 + 1"),
                      refused("terms[2].estimate", A_NUMBER, "'0.5 + 1'")),
    "NaN profile edge": (setting("terms", 1, "profile", "edges", 3, value=float("nan")),
                         refused("terms[1].profile.edges[3]", A_NUMBER, "'nan'")),
    "text profile edge": (setting("terms", 1, "profile", "edges", 3, value="0.06"),
                          refused("terms[1].profile.edges[3]", A_NUMBER, "'0.06'")),
    "infinite threshold": (setting("threshold", value=float("inf")), refused("threshold", A_NUMBER, "'inf'")),
    "text threshold": (setting("threshold", value="high"), refused("threshold", A_NUMBER, "'high'")),
    "unknown format": (setting("format", value=99), refused("format", "must be 1", "'99'")),
    "invalid UTF-8": (lambda raw: raw.replace(b"\nkey: lease_id\n", b"\nkey: lease\xff_id\n"),
                      f"{SOURCE}:4:11: not UTF-8 text (byte 0xFF); save the file as UTF-8"),
    # Hand edits of what the fingerprints cover.
    "term SQL changed to other SQL": (
        in_data(lambda data: young_firm(data).update(sql='CASE WHEN "firm_age_years" < 3 THEN 1 ELSE 0 END')),
        edited_by_hand("term young_firm's SQL does not match its fingerprint")),
    "term SQL changed to the target": (in_data(lambda data: young_firm(data).update(sql='"defaulted_12m"')),
                                       edited_by_hand("term young_firm's SQL reads the target defaulted_12m")),
    "term SQL changed to a forbidden function": (
        in_data(lambda data: young_firm(data).update(sql="RANDOM()")),
        edited_by_hand("term young_firm's SQL: RANDOM() is not deterministic: training and scoring would differ; "
                       "for a random split use the model's holdout setting")),
    "term SQL reading a file": (
        in_data(lambda data: young_firm(data).update(sql="LENGTH(READ_CSV('/etc/passwd'))")),
        edited_by_hand("term young_firm's SQL: READ_CSV reads outside the row (files, settings or the environment): "
                       "a term may use only the columns of its own row")),
    "term SQL holding a second statement": (
        in_data(lambda data: young_firm(data).update(sql='"firm_age_years"; DROP TABLE leases')),
        edited_by_hand("term young_firm's SQL is not one SQL expression")),
    "term fingerprint edited": (in_data(lambda data: young_firm(data).update(fingerprint="0123456789abcdef")),
                                edited_by_hand("term young_firm's SQL does not match its fingerprint")),
    "term fingerprint not hex": (in_data(lambda data: young_firm(data).update(fingerprint="31A7E9565C8F4616")),
                                 refused("terms[2].fingerprint", "must be 16 lowercase hexadecimal digits", "'31A7E9565C8F4616'")),
    "model fingerprint edited": (setting("fingerprint", value="0123456789abcdef"),
                                 edited_by_hand("the model fingerprint does not match depends_on")),
    "term deleted": (in_data(lambda data: data["terms"].pop(YOUNG_FIRM)),
                     edited_by_hand("depends_on lists term young_firm, which the file does not fit")),
    "target renamed": (setting("target", value="past_late_payments"),
                       edited_by_hand("target does not match depends_on.target")),
}

COMMANDS = {
    "sql": ("sql", MODEL, "--part", "score"),
    "score": ("score", MODEL, "--table", "leases", "--into", "scores"),
    "drift": ("drift", MODEL, "--table", "leases"),
    "report": ("report", MODEL),
}


@pytest.fixture(scope="module")
def computed(tmp_path_factory) -> Path:
    """The lease demo with its input loaded and design tables built, so every command could run."""
    root = copy_demo("lease_default", tmp_path_factory.mktemp("demo"))
    done = run("compute", "-p", str(root))
    assert done.returncode == 0, done.stderr
    return root


@pytest.fixture
def project(computed: Path, tmp_path: Path) -> Path:
    return Path(shutil.copytree(computed, tmp_path / computed.name))


def run_on_scratch_leases(sql: str, csv: Path) -> dict[str, int]:
    """Run `sql` (all its statements) on a scratch database holding a copy of the leases table;
    its tables and their rows afterwards."""
    with duckdb.connect() as connection:
        connection.read_csv(str(csv)).create("leases")
        if sql.strip():
            connection.execute(sql)
        return table_row_counts(connection=connection)


@pytest.mark.parametrize("command", COMMANDS)
@pytest.mark.parametrize("case", CASES)
def test_a_hostile_fitted_file_is_refused_in_one_line(project, case, command):
    edit, message = CASES[case]
    fitted = project / SOURCE
    fitted.write_bytes(edit(fitted.read_bytes()))
    database = project / "build" / "lease_default.duckdb"
    before = table_row_counts(database)

    done = run(*COMMANDS[command], "-p", str(project))

    assert (done.returncode, done.stderr) == (1, f"error: {message}\n")
    assert table_row_counts(database) == before
    assert run_on_scratch_leases(done.stdout, project / "data" / "leases.csv") == {"leases": LEASE_ROWS}


@pytest.mark.parametrize("header", [score_header, drift_header], ids=["score", "drift"])
@pytest.mark.parametrize("line_break", ["\n", "\r", "\u2028"], ids=["newline", "carriage return", "line separator"])
def test_the_sql_headers_refuse_a_line_break_even_from_an_unchecked_model(header, line_break):
    """The last guard: a model built in code, never read from a file, still cannot break a comment line."""
    fitted = read_fitted(DEMOS / "lease_default" / SOURCE)
    with pytest.raises(AssertionError, match="a SQL comment line holds a line break"):
        header(replace(fitted, model=f"{MODEL}{line_break}DROP TABLE leases; --"), "0123456789abcdef")
