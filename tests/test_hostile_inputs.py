"""Hostile project files and arguments: each is refused with one line naming the file or option.

Every case runs the command a user would type (conftest.run_featpipe, in process) and checks the exit
status (1 for a problem the user can fix, 2 for wrong usage), the one line that names the file and
position or the option, and that no traceback is printed. Where the input tries to reach the database
(an input name, a type, a table name), the DuckDB database must hold the same tables with the same row
counts afterwards.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from conftest import MODEL_YAML, PROJECT_YAML, copy_demo, table_row_counts, write_project
from conftest import run_featpipe as run

CHECK_SUMMARY = "1 error; nothing was run"  # what `featpipe check` prints under its diagnostics
TERM_FILE = "terms/hostile.sql"


def refusal(result) -> str:
    """The one line that says what is wrong: a diagnostic or `error: ...` (exit 1), `Error: ...` (usage, exit 2)."""
    output = result.stdout + result.stderr
    assert "Traceback" not in output and "internal error" not in output, output
    if result.returncode == 2:
        lines = [line for line in result.stderr.splitlines() if line.startswith("Error:")]
    else:
        lines = [line for line in result.stderr.splitlines() if line and line != CHECK_SUMMARY]
    assert len(lines) == 1, output
    return lines[0]


def term_file(expression: str, source: str = "FROM orders") -> str:
    return f"SELECT\n  {expression} AS hostile\n{source}\n"


TERM_SQL = {
    "5,000 parentheses": (
        term_file("(" * 5000 + "amount" + ")" * 5000),
        ("terms/hostile.sql:2:23: parentheses and CASE nest more than 20 deep here; "
         "split the expression into terms that use each other")),
    "800 nested CASE": (
        term_file("CASE WHEN amount > 1 THEN " * 800 + "1" + " END" * 800),
        # 20 CASEs of 26 characters each from column 3: the 21st starts at column 3 + 20 * 26.
        ("terms/hostile.sql:2:523: parentheses and CASE nest more than 20 deep here; "
         "split the expression into terms that use each other")),
    "a sum of 20,000 columns": (
        term_file(" + ".join(["amount"] * 20000)),
        # 20,000 names, 19,999 plus signs, AS and the term's name.
        "terms/hostile.sql:2:3: this term holds 40,001 tokens, more than 500; split it into terms that use each other"),
    "TABLESAMPLE": (
        term_file("amount * 2", "FROM orders TABLESAMPLE 10%"),
        ("terms/hostile.sql:3:13: a term file may not sample rows (TABLESAMPLE, USING SAMPLE); "
         "a term is computed for every row")),
    "PIVOT": (
        term_file("amount * 2", "FROM orders PIVOT (SUM(amount) FOR region IN ('north'))"),
        "terms/hostile.sql:3:13: a term file may not PIVOT or UNPIVOT its input; a term reads the input row as it is"),
    "LENGTH of a number": (
        term_file("LENGTH(amount)"),
        # DuckDB 2.0 refuses it when run: "No function matches the given name and argument types 'length(DOUBLE)'".
        "terms/hostile.sql:2:10: LENGTH takes text, but 'amount' is DOUBLE; use the number itself, or CAST it to VARCHAR"),
    "a 400-digit number": (
        term_file("amount * " + "9" * 400),
        # DuckDB 2.0 refuses it when run: "Conversion Error: Could not convert bignum ...".
        "terms/hostile.sql:2:12: the number 99999999999999999... has 400 digits; a number in a term may have at most 38: round it"),
    "a Latin-1 term file": (
        "-- Caf\xe9 terms\n" + term_file("amount * 2"),
        "terms/hostile.sql:1:7: not UTF-8 text (byte 0xE9); save the file as UTF-8"),
}


@pytest.mark.parametrize("text, expected", TERM_SQL.values(), ids=TERM_SQL.keys())
def test_hostile_term_sql_is_refused_at_check(tmp_path, text, expected):
    root = write_project(tmp_path)
    (root / TERM_FILE).write_bytes(text.encode("latin-1"))
    result = run("check", "-p", str(root))
    assert result.returncode == 1
    assert refusal(result) == expected


SPEC = "specs/returns.yaml"
PROJECT_FILES = {
    'a " in an input name': (
        {"featpipe.yaml": PROJECT_YAML.replace("  orders:", '  "ord\\"ers":'),
         SPEC: MODEL_YAML.replace("input: orders", "input: 'ord\"ers'")},
        ("featpipe.yaml:6:3: input name 'ord\"ers' must start with a letter and hold only letters, digits and _; "
         "it names a table in SQL")),
    "a statement in a column name": (
        {"featpipe.yaml": PROJECT_YAML.replace("      region: VARCHAR", '      "region; DROP TABLE orders": VARCHAR')},
        ("featpipe.yaml:13:7: column name 'region; DROP TABLE orders' must start with a letter and hold only letters, "
         "digits and _")),
    "a statement after a type": (
        {"featpipe.yaml": PROJECT_YAML.replace("region: VARCHAR", "region: VARCHAR); DROP TABLE orders; --")},
        ("featpipe.yaml:13:15: 'VARCHAR); DROP TABLE orders; --' is not a SQL type (for example BIGINT, DOUBLE, VARCHAR, "
         "BOOLEAN)")),
    "a list as the key": (
        {"featpipe.yaml": PROJECT_YAML.replace("key: order_id", "key: [order_id, items]")},
        "featpipe.yaml:7:10: key must name one column (e.g. key: order_id), not list ['order_id', 'items']"),
    "a list as a spec's input": (
        {SPEC: MODEL_YAML.replace("input: orders", "input: [orders]")},
        "specs/returns.yaml:1:8: 'input' must be one text, not list ['orders']"),
    "a list as a spec's weights": (
        {SPEC: MODEL_YAML + "weights: [items]\n"},
        "specs/returns.yaml:5:10: weights must name one column or be {column: c, kind: frequency}, not list ['items']"),
    "a list as a key of a mapping": (
        {SPEC: MODEL_YAML + "expect:\n  ? [items, northern]\n  : positive\n"},
        "specs/returns.yaml:6:5: a key must be a name, not a list or a mapping"),
    "a non-UTF-8 featpipe.yaml": (
        {"featpipe.yaml": PROJECT_YAML.replace("name: shop", "name: caf\xe9")},
        "featpipe.yaml:1:10: not UTF-8 text (byte 0xE9); save the file as UTF-8"),
}


@pytest.mark.parametrize("files, expected", PROJECT_FILES.values(), ids=PROJECT_FILES.keys())
def test_hostile_project_files_are_refused_and_change_no_table(tmp_path, files, expected):
    root = write_project(tmp_path)
    assert run("compute", "-p", str(root)).returncode == 0
    database = root / "build" / "shop.duckdb"
    before = table_row_counts(database)
    for relative, text in files.items():
        (root / relative).write_bytes(text.encode("latin-1"))
    result = run("compute", "-p", str(root))
    assert result.returncode == 1
    assert refusal(result) == f"error: {expected}"
    assert table_row_counts(database) == before


@pytest.fixture(scope="module")
def lease_demo(tmp_path_factory) -> Path:
    """The lease demo with its tables computed; the cases below must leave them as they are."""
    root = copy_demo("lease_default", tmp_path_factory.mktemp("hostile"))
    assert run("compute", "-p", str(root)).returncode == 0
    return root


NOT_A_TABLE = "is not a table name: give name or schema.name, each part must start with a letter and hold only letters, digits and _"
ARGUMENTS = {
    "a function as --table": (
        ("sql", "default_risk", "--part", "design", "--table", "read_csv('/etc/passwd')"),
        1, f"error: --table \"read_csv('/etc/passwd')\" {NOT_A_TABLE}"),
    "a statement as --table of the scoring SQL": (
        ("sql", "default_risk", "--part", "score", "--table", "leases; DROP TABLE leases"),
        1, f"error: --table 'leases; DROP TABLE leases' {NOT_A_TABLE}"),
    "a quote in --into of the scoring SQL": (
        ("sql", "default_risk", "--part", "score", "--into", 'x"y'),
        1, f"error: --into 'x\"y' {NOT_A_TABLE}"),
    "a quote in --into of score": (
        ("score", "default_risk", "--table", "leases", "--into", 'x"y'),
        1, f"error: --into 'x\"y' {NOT_A_TABLE}"),
    "a function as --table of score": (
        ("score", "default_risk", "--table", "read_csv('/etc/passwd')", "--into", "scores"),
        1, f"error: --table \"read_csv('/etc/passwd')\" {NOT_A_TABLE}"),
    "three parts as --table of drift": (
        ("drift", "default_risk", "--table", "other.main.leases"),
        1, f"error: --table 'other.main.leases' {NOT_A_TABLE}"),
    "a missing option": (
        ("score", "default_risk", "--table", "leases"),
        2, "Error: Missing option '--into' / '-o'."),
    "an unknown command": (
        ("materialize", "default_risk"),
        2, "Error: No such command 'materialize'."),
}


@pytest.mark.parametrize("args, status, expected", ARGUMENTS.values(), ids=ARGUMENTS.keys())
def test_hostile_arguments_are_refused_and_change_no_table(lease_demo, args, status, expected):
    database = lease_demo / "build" / "lease_default.duckdb"
    before = table_row_counts(database)
    result = run(*args, "-p", str(lease_demo))
    assert result.returncode == status
    assert refusal(result) == expected
    if status == 2:  # the usage names the command as users type it, also when featpipe runs inside another program
        assert "\nTry 'featpipe " in result.stderr
    assert table_row_counts(database) == before


def test_a_table_in_a_schema_is_named_by_quoted_identifiers(lease_demo):
    result = run("sql", "default_risk", "--part", "design", "--table", "staging.leases", "-p", str(lease_demo))
    assert result.returncode == 0
    assert 'FROM "staging"."leases"' in result.stdout
