"""Every benchmark runs at a tiny size, so a change to featpipe that breaks one fails here, not in front of a user.

Each script in benchmarks/ runs as a user runs it (`python benchmarks/bench_X.py` in a new process of
this Python) on a few thousand rows. The test checks that it exits 0, that its first lines say what it
ran on (package versions, core count, load average), that it prints its ratio lines, and that its
agreement figures (rows, relative differences of coefficients or predictions) are within tolerance.
A speed is never asserted: at this size and on a shared machine the ratios mean nothing.
"""

from __future__ import annotations

import importlib.util
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import REPO
from fixtures_engines import postgres_programs, require_engine

import featpipe

BENCHMARKS = REPO / "benchmarks"
NUMBER = r"(\d[\d,]*(?:\.\d+)?(?:e[+-]\d+)?)"  # as the benchmarks print them: 2,080 or 0.351 or 1.5e-08


def run_benchmark(script: str, *arguments: str) -> list[str]:
    """The lines `script` printed; it must exit 0 and start with the context lines."""
    done = subprocess.run([sys.executable, str(BENCHMARKS / script), *arguments], cwd=REPO, capture_output=True,
                          text=True, timeout=900, check=False)
    assert done.returncode == 0, f"{script} exited with {done.returncode}:\n{done.stdout}\n{done.stderr[-3000:]}"
    lines = done.stdout.splitlines()
    assert lines[0].startswith(f"Python {sys.version.split()[0]}; featpipe {featpipe.__version__}, "), lines[0]
    assert re.fullmatch(r"\d+ cores; load average \d+\.\d\d \d+\.\d\d \d+\.\d\d", lines[1]), lines[1]
    return lines


def figures(pattern: str, lines: list[str]) -> tuple[float, ...]:
    """The numbers of the one line that matches `pattern` in full ({n} stands for a number)."""
    matched = [found for line in lines if (found := re.fullmatch(pattern.replace("{n}", NUMBER), line))]
    assert len(matched) == 1, f"expected one line like {pattern!r} in:\n" + "\n".join(lines)
    return tuple(float(value.replace(",", "")) for value in matched[0].groups())


def require_postgres() -> None:
    if importlib.util.find_spec("psycopg") is None:
        require_engine("postgres", "the psycopg package is not installed (pip install -e '.[test]')")
    if postgres_programs() is None:
        require_engine("postgres", "initdb/pg_ctl not found on PATH or in /usr/lib/postgresql/*/bin")


def require_spark() -> None:
    if importlib.util.find_spec("pyspark") is None:
        require_engine("spark", "the pyspark package is not installed (pip install -e '.[test]')")
    java_home = os.environ.get("JAVA_HOME")
    if not shutil.which("java") and not (java_home and Path(java_home, "bin", "java").is_file()):
        require_engine("spark", "no Java runtime (java on PATH or JAVA_HOME); Spark 4 needs Java 17 or newer")


def test_bench_fit_agrees_with_scikit_learn():
    lines = run_benchmark("bench_fit.py", "--rows", "3000")

    featpipe_rows, sklearn_rows = figures(r"training rows: {n} \(scikit-learn: {n}\); .*", lines)
    assert featpipe_rows == sklearn_rows
    assert 0 < featpipe_rows < 3000  # 30% of the rows are held out
    for route in ("featpipe", "SQL aggregates"):
        figures(rf"time +{route} / \(fetch \+ scikit-learn\): {{n}}.*", lines)
        figures(rf"memory {route} / \(fetch \+ scikit-learn\): {{n}}.*", lines)
    to_sklearn, stream_to_sql = figures(
        r"coefficients, max relative difference: featpipe vs scikit-learn {n}, stream vs SQL aggregates {n}", lines)
    # scikit-learn's LogisticRegression(solver="newton-cholesky") stops at its own tolerance (tol=1e-4),
    # so it agrees with featpipe's IRLS to about 1e-8 here, not to the last digit.
    assert to_sklearn < 1e-6
    assert stream_to_sql < 1e-9  # the same IRLS over the same rows; only the order of the sums differs


def test_bench_fit_commands_prints_compute_against_one_create_table_as_in_time_and_cpu():
    lines = run_benchmark("bench_fit.py", "--commands", "--compute-only", "--rows", "3000")

    figures(r"featpipe compute +{n} +{n} +{n}   {n}", lines)  # seconds, CPU seconds, peak RSS, each run
    figures(r"DuckDB CREATE TABLE AS from the file +{n} +{n} +{n}   {n}", lines)
    figures(r"time   featpipe compute / CREATE TABLE AS: {n}   \(goal <= 2\)", lines)
    figures(r"CPU    featpipe compute / CREATE TABLE AS: {n}   \(same runs; steadier on a busy machine\)", lines)


def test_bench_score_scores_the_fitted_model_as_pandas_does():
    lines = run_benchmark("bench_score.py", "--rows", "3000")

    (train,) = figures(r"fitted with featpipe\.api\.fit on {n} training rows in .* converged: True\)", lines)
    assert 0 < train < 3000
    for route in ("sql", "sql, contributions", "sql, 3 reasons", "sql, lean reasons", "pandas"):
        figures(rf"{re.escape(route)} +{{n}} +{{n}} +{{n}} +{{n}}x +{{n}}x", lines)
    figures(r"target: throughput >= 6x pandas: {n}x \((?:met|NOT met)\); memory <= 1/4 of pandas: {n} \((?:met|NOT met)\)", lines)
    for route in ("sql, 3 reasons", "sql, lean reasons"):
        figures(rf"target: throughput with 3 reasons >= 3x pandas \({re.escape(route)}\): {{n}}x \((?:met|NOT met)\)", lines)
    sql_rows, pandas_rows, difference = figures(
        r"rows scored: sql {n}, pandas {n}; relative difference of the prediction sums {n}", lines)
    assert sql_rows == pandas_rows
    assert 2900 < sql_rows < 3000  # about 1% of the invented revenues are missing and a few are zero
    assert difference < 1e-12  # the same coefficients from the fitted file; only rounding differs


def test_bench_engines_fits_the_same_coefficients_on_duckdb_and_postgres():
    require_postgres()
    lines = run_benchmark("bench_engines.py", "--rows", "1000", "2000", "--engines", "duckdb", "postgres")

    for kind in ("duckdb", "postgres"):
        figures(rf"  {kind} +{{n}}x", lines)  # peak RSS at 2,000 rows against 1,000 rows
        for rows in ("1,000", "2,000"):
            figures(rf"  {kind} +{rows} rows: fit {{n}} s, scan {{n}} s, fit / scan {{n}}x", lines)
    for rows in ("1,000", "2,000"):
        duckdb_train, duckdb_scored, postgres_train, postgres_scored, difference = figures(
            rf" +{rows} rows: duckdb train {{n}}, scored {{n}}; postgres train {{n}}, scored {{n}}, coefficients {{n}}", lines)
        assert (postgres_train, postgres_scored) == (duckdb_train, duckdb_scored)
        assert duckdb_scored == float(rows.replace(",", ""))
        assert difference < 1e-9  # the same IRLS on the same rows; only each engine's order of summing differs


@pytest.mark.spark
def test_bench_engines_fits_the_same_coefficients_on_duckdb_and_spark():
    require_spark()
    lines = run_benchmark("bench_engines.py", "--rows", "1000", "--engines", "duckdb", "spark")

    duckdb_train, duckdb_scored, spark_train, spark_scored, difference = figures(
        r" +1,000 rows: duckdb train {n}, scored {n}; spark train {n}, scored {n}, coefficients {n}", lines)
    assert (spark_train, spark_scored) == (duckdb_train, duckdb_scored) and duckdb_scored == 1000
    assert difference < 1e-9  # the same IRLS on the same rows; only each engine's order of summing differs


def test_bench_startup_prints_its_ratios_to_the_floor():
    lines = run_benchmark("bench_startup.py", "--repeat", "1")

    for command in ("import duckdb, sqlglot, yaml", "featpipe check -p projects/lease_default", "featpipe --help"):
        figures(rf"{re.escape(command)} +{{n}} +{{n}} +{{n}} +{{n}}", lines)
    figures(r"check / floor \(medians\): {n}x; target at most 1\.5x: (?:met|NOT met)", lines)


def test_bench_suggest_counts_its_scans_and_agrees_with_statsmodels():
    lines = run_benchmark("bench_suggest.py", "--rows", "3000", "--candidates", "60")

    rows, train, _one_scan = figures(r"rows {n}; training rows {n}; one scan {n} s", lines)
    assert rows == 3000 and 0 < train < 3000
    for model in ("raw", "learned"):  # raw columns; x4 as a SPLINE and the text column as LEVELS
        generated, tested, dropped, counted, reported = figures(
            rf"model {model}: candidates generated {{n}}, tested {{n}}, dropped {{n}}; scans counted {{n}}, reported {{n}} "
            r"\(target at most 3\), LIMIT samples {n}; suggest {n} s \(queries {n} s\), suggest / one scan {n}x", lines)[:5]
        assert tested + dropped == 60 < generated
        assert counted == reported == 3  # column figures, text levels, one chunk of sums
    figures(r"learned / raw suggest time {n}x", lines)
    (difference,) = figures(r"top candidate \w+: score statistic featpipe {n}, statsmodels {n}, relative difference {n}", lines)[2:]
    assert difference < 1e-8  # statsmodels' score test on the same rows in memory


def test_bench_crossval_chooses_the_strength_scikit_learn_chooses():
    lines = run_benchmark("bench_crossval.py", "--rows", "3000")

    # seconds, CPU seconds, peak RSS, the chosen l2, each run's seconds
    chosen = {figures(rf"{re.escape(route)} +{{n}} +{{n}} +{{n}} +{{n}}   {{n}}", lines)[3]
              for route in ("featpipe fit", "pandas + scikit-learn")}
    assert len(chosen) == 1
    _, difference = figures(r"featpipe fit / scikit-learn: time {n}; cross-validated deviances, max relative difference {n}", lines)
    assert difference < 1e-4  # scikit-learn's newton-cholesky stops at its own tolerance (tol=1e-4): about 1e-6 here
