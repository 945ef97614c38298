"""The command line as a user runs it: exit codes, messages, JSON and annotations.

Commands run in this process through the console entry point (`run`, conftest.run_featpipe). A new
process runs them where only one shows the behaviour: the whole job as typed, a second process
holding the database, and which libraries a command loads.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

from conftest import copy_demo, write_project
from conftest import run_featpipe as run

import featpipe

# What fitting, scoring, reports and engines need; `featpipe check` and `featpipe --help` must not load it.
HEAVY = {"pandas", "numpy", "scipy", "matplotlib", "pyarrow", "statsmodels", "sklearn", "jinja2", "duckdb"}


def run_process(*args: str) -> subprocess.CompletedProcess:
    """`featpipe ARGS` in a new Python process, as typed at a shell."""
    return subprocess.run([sys.executable, "-m", "featpipe", *args], capture_output=True, text=True, timeout=120,
                          env={**os.environ, "FEATPIPE_DEBUG": ""}, check=False)


def modules_loaded_by(*args: str) -> set[str]:
    """Every module a fresh interpreter holds after `featpipe ARGS` ran in it (and exited with 0)."""
    script = ("import featpipe.cli, sys\n"
              "try:\n    featpipe.cli.main(sys.argv[1:])\n"
              "except SystemExit as done:\n    print(done.code, *sorted(sys.modules))\n")
    done = subprocess.run([sys.executable, "-c", script, *args], capture_output=True, text=True, timeout=120, check=True)
    status, *modules = done.stdout.splitlines()[-1].split()
    assert status == "0", done.stderr
    return set(modules)


def test_check_and_help_load_only_what_they_use(tmp_path):
    root = copy_demo("lease_default", tmp_path)
    assert modules_loaded_by("check", "-p", str(root)) & {*HEAVY, "pygments", "rich.syntax", "rich.table"} == set()
    # typer draws the help with rich's tables (and so pygments); it needs no project, SQL or YAML.
    assert modules_loaded_by("--help") & {*HEAVY, "featpipe.api", "sqlglot", "yaml"} == set()


def test_compute_loads_no_pandas(tmp_path):
    """Computing design tables moves no rows through Python, so pandas (about half a second to import)
    stays unloaded; the engines load it only to hand out a frame."""
    root = copy_demo("lease_default", tmp_path)
    assert "pandas" not in modules_loaded_by("compute", "-p", str(root))


def test_a_wrong_option_shows_the_usage_not_an_internal_error():
    result = run("check", "--bogus")
    assert result.returncode == 2
    assert result.stderr.endswith("\n\nError: No such option: --bogus\n")
    assert "internal error" not in result.stderr


def test_a_bug_is_one_line_with_exit_2_and_the_traceback_only_on_request(project_dir, monkeypatch):
    """An error featpipe did not expect is an internal error: exit 2, its type and text on one line, and
    the way to the traceback; FEATPIPE_DEBUG=1 shows the traceback itself."""
    from featpipe import api

    def broken(project):
        raise RuntimeError("the check broke")

    monkeypatch.setattr(api, "check_report", broken)
    result = run("check", "-p", str(project_dir))
    assert result.returncode == 2
    assert result.stderr.splitlines() == [
        "internal error: RuntimeError: the check broke",
        "set FEATPIPE_DEBUG=1 to see the traceback, and please report it"]

    debugged = run("check", "-p", str(project_dir), env={"FEATPIPE_DEBUG": "1"})
    assert debugged.returncode == 2 and "Traceback (most recent call last)" in debugged.stderr


def test_check_refuses_a_file_reading_function_and_runs_nothing(tmp_path):
    root = write_project(tmp_path, {"terms/sneaky.sql": "SELECT\n  LENGTH(read_text('/etc/passwd')) AS leak\nFROM orders\n"})
    result = run("check", "-p", str(root))
    assert result.returncode == 1
    assert result.stderr.startswith("terms/sneaky.sql:2:10: ")
    assert "Traceback" not in result.stderr
    assert not (root / "build").exists()


def test_check_refuses_an_environment_reading_function(tmp_path):
    root = write_project(tmp_path, {"terms/sneaky.sql": "SELECT\n  LENGTH(getenv('HOME')) AS leak\nFROM orders\n"})
    result = run("check", "-p", str(root))
    assert result.returncode == 1 and result.stderr.startswith("terms/sneaky.sql:2:10: ")


def test_compute_refuses_a_smuggled_statement_and_touches_nothing(tmp_path):
    root = write_project(tmp_path, {"terms/sneaky.sql": "SELECT amount AS a2 FROM orders; DROP TABLE orders"})
    result = run("compute", "-p", str(root))
    assert result.returncode == 1
    assert "terms/sneaky.sql:1:34: a term file holds exactly one SELECT; remove the second statement" in result.stderr
    assert not (root / "build").exists()


def test_check_json_and_github_formats(tmp_path):
    root = write_project(tmp_path, {"terms/bad.sql": "SELECT\n  amonut AS a2\nFROM orders\n"})
    result = run("check", "-p", str(root), "--json")
    assert result.returncode == 1
    (diagnostic,) = json.loads(result.stdout)["diagnostics"]
    assert (diagnostic["file"], diagnostic["line"], diagnostic["col"]) == ("terms/bad.sql", 2, 3)
    result = run("check", "--format", "github", cwd=root)
    assert result.stdout.startswith("::error file=terms/bad.sql,line=2,col=3::unknown name 'amonut'")


def test_a_new_project_checks_and_computes(tmp_path):
    target = tmp_path / "churn_demo"
    assert run("new", str(target)).returncode == 0
    assert run("check", "-p", str(target)).returncode == 0
    result = run("compute", "-p", str(target), "--json")
    assert result.returncode == 0, result.stderr
    assert json.loads(result.stdout) == [{"model": "churn", "table": "design_churn", "rows": 400}]
    assert run("new", str(target)).returncode == 1  # refuses a folder that already holds files


def test_a_second_process_holding_the_database_gets_a_clear_message(project_dir):
    featpipe.compute(featpipe.load_project(project_dir))
    holder = subprocess.Popen(
        [sys.executable, "-c", "import duckdb, sys, time; c = duckdb.connect(sys.argv[1]); print('held', flush=True); time.sleep(60)",
         str(project_dir / "build" / "shop.duckdb")],
        stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        result = run_process("compute", "-p", str(project_dir))
    finally:
        holder.kill()
    assert result.returncode == 1
    assert "is in use by another process" in result.stderr and "Traceback" not in result.stderr


def test_an_unknown_model_is_a_user_error(project_dir):
    result = run("sql", "nosuch", "-p", str(project_dir))
    assert result.returncode == 1
    assert result.stderr.strip() == "error: unknown model nosuch; specs in specs/: returns"


def test_the_whole_job_from_the_command_line(tmp_path):
    """refresh (in its own process), explain, score, drift, report and sql on a copy of the lease demo."""
    root = copy_demo("lease_default", tmp_path)
    refreshed = run_process("refresh", "-p", str(root))
    assert refreshed.returncode == 0, refreshed.stderr
    assert (root / "build" / "reports" / "default_risk.html").is_file()
    assert "everything is up to date" in run("refresh", "-p", str(root)).stdout

    explained = run("explain", "payment_to_revenue", "-p", str(root))
    assert explained.returncode == 0 and "multiplies the odds" in explained.stdout

    scored = run("score", "default_risk", "--table", "leases", "--into", "scored", "--reasons", "2", "-p", str(root), "--json")
    assert scored.returncode == 0, scored.stderr
    assert json.loads(scored.stdout)["status"] == {"missing: payment_to_revenue": 58, "ok": 4942}

    drift = run("drift", "default_risk", "--table", "leases", "--fail-above", "0.1", "-p", str(root))
    assert drift.returncode == 0 and "stable" in drift.stdout

    report = run("report", "default_risk", "--against", "default_raw", "-p", str(root), "--json")
    assert report.returncode == 0 and json.loads(report.stdout)["path"].endswith("default_risk-vs-default_raw.html")

    for part in ("terms", "design", "score", "drift"):
        printed = run("sql", "default_risk", "--part", part, "--dialect", "postgres", "-p", str(root))
        assert printed.returncode == 0 and "SELECT" in printed.stdout, printed.stderr
    assert run("sql", "default_risk", "--part", "design", "--reasons", "2", "-p", str(root)).returncode == 1


def test_drift_fails_above_the_limit_and_diff_fails_on_stale(tmp_path):
    root = copy_demo("fleet_claims", tmp_path)
    git = ["git", "-c", "user.name=t", "-c", "user.email=t@example.invalid"]
    assert run("fit", "-p", str(root)).returncode == 0
    subprocess.run(["git", "init", "-q"], cwd=root, check=True)
    subprocess.run([*git, "add", "."], cwd=root, check=True)
    subprocess.run([*git, "commit", "-qm", "fit"], cwd=root, check=True)

    with featpipe.connect(featpipe.load_project(root)) as engine:  # a batch whose drivers all drive at night
        from sqlglot import exp

        shifted = exp.select("*").from_("vehicle_years")
        shifted.set("expressions", [exp.Star(replace=[exp.alias_(exp.column("annual_km"), "night_km")])])
        engine.create_table("night_batch", shifted)
    drift = run("drift", "claim_frequency", "--table", "night_batch", "--fail-above", "0.25", "-p", str(root))
    assert drift.returncode == 1 and "PSI above 0.25: night_share" in drift.stderr

    usage = root / "terms" / "usage.sql"
    usage.write_text(usage.read_text().replace("/ 1000.0", "/ 100.0"))
    assert run("diff", "-p", str(root), "--since", "HEAD").returncode == 0
    gated = run("diff", "-p", str(root), "--since", "HEAD", "--fail-on-stale", "--format", "markdown")
    assert gated.returncode == 1 and "km_per_driver" in gated.stdout


def test_fit_prints_each_model_as_it_is_written_before_a_later_model_fails(tmp_path):
    root = copy_demo("lease_default", tmp_path)
    spec = root / "specs" / "default_risk.yaml"
    spec.write_text(spec.read_text().replace("max_dropped: 0.03", "max_dropped: 0.0"))
    result = run("fit", "default_raw", "default_risk", "-p", str(root))
    assert result.returncode == 1
    assert "default_raw: binomial (logit link)" in result.stdout
    assert f"wrote {root / 'fitted' / 'default_raw.yaml'}" in result.stdout
    assert result.stderr.splitlines()[-1].startswith("error: specs/default_risk.yaml: ")
    assert "more than max_dropped 0" in result.stderr


def test_check_reports_a_specs_own_errors_and_the_compilers_in_one_run(tmp_path):
    """An unknown key in a spec does not hide the term file's errors or the spec's unknown term."""
    root = write_project(tmp_path / "shop", {
        "specs/returns.yaml": "input: orders\ntarget: returned\nfamily: binomial\ntreshold: 0.3\nterms: [item_prise]\n",
        "terms/extra.sql": "SELECT amount + region AS odd FROM orders",
    })
    result = run("check", "-p", str(root))
    assert result.returncode == 1
    assert result.stderr.splitlines() == [
        "specs/returns.yaml:4:1: unknown key 'treshold'; did you mean 'threshold'?",
        "specs/returns.yaml:5:9: unknown term 'item_prise'; did you mean 'item_price'?",
        "terms/extra.sql:1:17: arithmetic on text: 'region' is TEXT; compare it to a value "
        "(e.g. CASE WHEN x = 'a' THEN 1 ELSE 0 END) or CAST it",
        "3 errors; nothing was run",
    ]
