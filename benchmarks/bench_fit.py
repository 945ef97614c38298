"""Fit a logistic regression on a large design table: featpipe in the engine vs pandas + scikit-learn.

    .venv/bin/python benchmarks/bench_fit.py --rows 1000000
    .venv/bin/python benchmarks/bench_fit.py --rows 10000000 --keep build/bench10m.duckdb
    .venv/bin/python benchmarks/bench_fit.py --commands --rows 10000000 --keep build/bench10m.duckdb
    .venv/bin/python benchmarks/bench_fit.py --commands --compute-only --repeat 3 --rows 2000000

A seeded synthetic binomial design table (30% held out, 15 continuous terms on mixed scales with some
correlation, 10 indicators) is generated inside DuckDB with SQL, so building it never holds the table
in Python. Each competitor then runs in its own subprocess against the same database file, so each
peak RSS (measured in the child) is its own:

- featpipe: `Glm.fit` streaming the training rows from DuckDB in batches (the default on DuckDB);
- featpipe, SQL aggregates: one aggregate query per IRLS pass (what PostgreSQL and Spark use);
- pandas + scikit-learn: fetch the training rows into a DataFrame, then
  LogisticRegression(solver="newton-cholesky", C=inf) (scikit-learn >= 1.8 spells penalty=None as C=inf).

Printed: the package versions, core count and load average (benchmarks/context.py), then side by
side: seconds, peak RSS, passes over the data, ratios, and the largest relative difference between
coefficients. On a shared machine use --repeat: the competitors then run
interleaved and the fastest run of each is compared. Targets at 10M rows: featpipe time <= half of fetch + fit, peak
memory <= a fifth.

With --commands it times what a user runs instead, each a child process with its own peak RSS: the
same rows (all for training, no holdout) written to a parquet file that a project loads, then
`featpipe compute` (from an empty engine file) and `featpipe fit`, against DuckDB writing the same
terms from the same file to a table with one CREATE TABLE AS (the model's own design query reading the
parquet file, DuckDB's default settings), and fetch + scikit-learn on the design table `featpipe
compute` built. Targets at 10M rows: compute <= 2x the CREATE TABLE AS; fit <= 0.5x fetch +
scikit-learn in time and <= 0.2x in peak RSS; coefficients equal to 1e-6. CPU seconds (all threads of
the child) are printed beside the wall times: on a machine shared with other work they vary less.
`--compute-only` times just `featpipe compute` against the CREATE TABLE AS.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from sqlglot import exp

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from context import machine_context  # noqa: E402
from memory import peak_rss_mb  # noqa: E402

from featpipe.compiler.layout import DesignLayout  # noqa: E402
from featpipe.engines.duckdb import DuckDBEngine  # noqa: E402
from featpipe.sqlgen.common import alias, column, number  # noqa: E402
from featpipe.sqlgen.statistics import design_columns_query  # noqa: E402

TABLE = "design_bench"
CONTINUOUS = 15
INDICATORS = 10
SEED = 20240611
TWO_52 = 2**52
STREAMS = 1000  # random streams per row
PACKAGES = ("featpipe", "duckdb", "sqlglot", "numpy", "pandas", "scikit-learn")


def layout() -> DesignLayout:
    terms = tuple(f"x{j:02d}" for j in range(CONTINUOUS)) + tuple(f"d{j:02d}" for j in range(INDICATORS))
    return DesignLayout(TABLE, "id", "y", terms)


def _uniform(stream: int) -> exp.Expression:
    """A uniform in [0, 1) from a hash of one integer per (row, stream, seed): deterministic, parallel-safe.

    (With row and stream as separate arguments their hashes would be combined linearly, and the
    streams of a row would depend on each other.)"""
    key = exp.Add(this=exp.Mul(this=column("i"), expression=exp.Literal.number(STREAMS)), expression=exp.Literal.number(stream))
    hashed = exp.Anonymous(this="hash", expressions=[key, exp.Literal.number(SEED)])
    return exp.Div(this=exp.Paren(this=exp.Mod(this=hashed, expression=exp.Literal.number(TWO_52))), expression=number(TWO_52))


def _normal(stream: int) -> exp.Expression:
    """Box-Muller from two uniforms."""
    radius = exp.Sqrt(this=exp.Mul(this=number(-2.0), expression=exp.Ln(this=exp.Sub(this=number(1.0), expression=_uniform(2 * stream)))))
    angle = exp.Mul(this=number(2 * math.pi), expression=_uniform(2 * stream + 1))
    return exp.Mul(this=radius, expression=exp.Anonymous(this="cos", expressions=[angle]))


def table_query(rows: int) -> exp.Select:
    """Rows of the synthetic design table, built in three nested SELECTs (no lateral aliases)."""
    source = exp.Table(
        this=exp.Anonymous(this="range", expressions=[exp.Literal.number(rows)]),
        alias=exp.TableAlias(this=exp.to_identifier("t"), columns=[exp.to_identifier("i")]),
    )
    raw = [alias(column("i"), "id"), alias(exp.LT(this=_uniform(999), expression=number(0.3)), "_holdout")]
    raw += [alias(_normal(j), f"z{j:02d}") for j in range(CONTINUOUS)]
    raw += [alias(_uniform(500 + j), f"u{j:02d}") for j in range(INDICATORS)]
    raw.append(alias(_uniform(998), "u_target"))
    inner = exp.select(*raw).from_(source).subquery("draws")

    scales = [1.0, 10.0, 0.2, 1000.0, 3.0] * 3
    terms = [alias(column("id"), "id"), alias(column("_holdout"), "_holdout"), alias(column("u_target"), "u_target")]
    for j in range(CONTINUOUS):
        value = column(f"z{j:02d}")
        if j % 3 == 1:  # correlated with the previous term
            value = exp.Add(this=exp.Mul(this=number(0.6), expression=column(f"z{j - 1:02d}")), expression=exp.Mul(this=number(0.8), expression=value))
        scaled = exp.Add(this=exp.Mul(this=number(scales[j]), expression=exp.Paren(this=value)), expression=number(0.5 * scales[j] * (j % 4)))
        terms.append(alias(exp.Round(this=scaled, decimals=exp.Literal.number(3)), f"x{j:02d}"))
    for j in range(INDICATORS):
        share = 0.05 + 0.045 * j
        flag = exp.Case(ifs=[exp.If(this=exp.LT(this=column(f"u{j:02d}"), expression=number(share)), true=number(1.0))], default=number(0.0))
        terms.append(alias(flag, f"d{j:02d}"))
    middle = exp.select(*terms).from_(inner).subquery("terms")

    # About 0.3 on the log-odds scale per sd of each continuous term: a useful but not perfect model.
    slopes = [0.3, -0.03, 1.5, 0.0003, -0.1] * 3 + [0.4, -0.4, 0.3, -0.3, 0.2, -0.2, 0.1, -0.1, 0.0, 0.25]
    names = layout().terms
    eta = number(-0.5)
    for name, slope in zip(names, slopes, strict=True):
        eta = exp.Add(this=eta, expression=exp.Mul(this=number(slope), expression=column(name)))
    probability = exp.Div(this=number(1.0), expression=exp.Paren(this=exp.Add(this=number(1.0), expression=exp.Exp(this=exp.Neg(this=exp.Paren(this=eta))))))
    target = exp.Case(ifs=[exp.If(this=exp.LT(this=column("u_target"), expression=probability), true=number(1.0))], default=number(0.0))
    outer = [alias(column("id"), "id"), alias(target, "y"), alias(column("_holdout"), "_holdout")]
    outer += [alias(column(name), name) for name in names]
    return exp.select(*outer).from_(middle)


def build_table(path: Path, rows: int) -> None:
    engine = DuckDBEngine(path)
    try:
        existing = engine.describe(TABLE)
        if existing is not None and engine.fetch(exp.select(exp.Count(this=exp.Star())).from_(TABLE))[0][0] == rows:
            return
        engine.create_table(TABLE, table_query(rows))
    finally:
        engine.close()


def child_featpipe(path: Path, source: str) -> dict:
    from featpipe.glm import Glm

    engine = DuckDBEngine(path, read_only=True)
    start_rss = peak_rss_mb()
    started = time.perf_counter()
    fit = Glm("binomial", source=source).fit(engine, layout())
    seconds = time.perf_counter() - started
    convergence = fit.convergence
    return {
        "seconds": seconds, "peak_rss_mb": peak_rss_mb(), "start_rss_mb": start_rss, "passes": convergence.passes_over_data,
        "iterations": convergence.iterations, "rows": fit.rows.n, "coef": list(fit.estimates), "converged": convergence.converged,
    }


def child_sklearn(path: Path, design: DesignLayout | None = None) -> dict:
    from sklearn.linear_model import LogisticRegression

    design = design or layout()
    engine = DuckDBEngine(path, read_only=True)
    start_rss = peak_rss_mb()
    started = time.perf_counter()
    frame = engine.fetch_frame(design_columns_query(design))
    fetched = time.perf_counter()
    x = frame[list(design.terms)].to_numpy()
    y = frame["_y"].to_numpy()
    model = LogisticRegression(solver="newton-cholesky", C=np.inf).fit(x, y)
    seconds = time.perf_counter() - started
    return {
        "seconds": seconds, "fetch_seconds": fetched - started, "peak_rss_mb": peak_rss_mb(), "start_rss_mb": start_rss,
        "passes": 1, "iterations": int(model.n_iter_[0]), "rows": len(y),
        "coef": [float(model.intercept_[0]), *map(float, model.coef_[0])],
    }


def run_child(kind: str, path: Path, source: str = "auto") -> dict:
    command = [sys.executable, __file__, "--child", kind, "--source", source, "--db", str(path)]
    result = subprocess.run(command, capture_output=True, text=True, check=False)
    if result.returncode != 0:
        raise SystemExit(f"child {kind} failed:\n{result.stdout}\n{result.stderr[-3000:]}")
    return json.loads(result.stdout.strip().splitlines()[-1])


MODEL = "risk"
INPUT = "rows"


def write_project(folder: Path, db: Path) -> Path:
    """A project whose one input is the bench table's rows as a parquet file and whose model lists its
    columns as terms: binomial, no holdout (the parquet is written once and kept beside `db`)."""
    data = db.with_suffix(".parquet")
    if not data.is_file():
        engine = DuckDBEngine(db, read_only=True)
        try:
            outputs = [column("id"), column("y"), *(column(name) for name in layout().terms)]
            rows = exp.select(*outputs).from_(TABLE).order_by(column("id"))
            engine.connection.sql(engine.render(rows)).write_parquet(str(data))
        finally:
            engine.close()
    project = folder / "project"
    (project / "specs").mkdir(parents=True, exist_ok=True)
    (project / "terms").mkdir(exist_ok=True)
    columns = "\n".join(f"      {name}: DOUBLE" for name in ("y", *layout().terms))
    (project / "featpipe.yaml").write_text(
        f"name: bench\nengine:\n  kind: duckdb\n  path: build/bench.duckdb\ninputs:\n  {INPUT}:\n    key: id\n"
        f"    load: {data}\n    columns:\n      id: BIGINT\n{columns}\n"
    )
    terms = ", ".join(layout().terms)
    (project / "specs" / f"{MODEL}.yaml").write_text(
        f"input: {INPUT}\ntarget: y\nfamily: binomial\nterms: [{terms}]\nholdout: {{fraction: 0.0}}\n"
    )
    return project


def child_command(project: Path, words: str) -> dict:
    """`featpipe WORDS -p PROJECT` in this process, as the console script runs it."""
    from featpipe.cli import main

    started, cpu = time.perf_counter(), cpu_seconds()
    try:
        main([*words.split(), "-p", str(project)])
    except SystemExit as done:
        if done.code:
            raise
    return {"seconds": time.perf_counter() - started, "cpu_seconds": cpu_seconds() - cpu, "peak_rss_mb": peak_rss_mb()}


def child_create_table(project: Path, db: Path) -> dict:
    """DuckDB writing the same terms from the same file to a table with one CREATE TABLE AS: the model's own
    design query (`featpipe sql --part design`) reading the input's parquet file, in a new database file
    with DuckDB's default settings."""
    import duckdb

    import featpipe
    from featpipe.engines.statements import create_table_as
    from featpipe.sqlgen.common import render
    from featpipe.sqlgen.design import design_query

    loaded = featpipe.load_project(project)
    source = loaded.inputs[INPUT]
    from_file = exp.Anonymous(this="read_parquet", expressions=[exp.Literal.string(str(source.load))])
    query = design_query(featpipe.check(loaded).models[MODEL], source).from_(from_file)
    statement = render(create_table_as("reference", query), "duckdb")
    target = project / "reference.duckdb"
    target.unlink(missing_ok=True)
    started, cpu = time.perf_counter(), cpu_seconds()
    connection = duckdb.connect(str(target))
    connection.execute(statement)
    connection.close()
    seconds = time.perf_counter() - started
    target.unlink()
    return {"seconds": seconds, "cpu_seconds": cpu_seconds() - cpu, "peak_rss_mb": peak_rss_mb()}


def cpu_seconds() -> float:
    """User and system CPU time of this process so far, all threads: steadier than wall time on a busy machine."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def child_project_sklearn(project: Path) -> dict:
    """Fetch + scikit-learn on the design table `featpipe compute` built."""
    import featpipe

    model_layout = featpipe.check(featpipe.load_project(project)).models[MODEL].layout
    return child_sklearn(project / "build" / "bench.duckdb", model_layout)


def run_command_child(kind: str, project: Path, db: Path, words: str = "") -> dict:
    command = [sys.executable, __file__, "--child", kind, "--project", str(project), "--db", str(db), "--words", words]
    result = subprocess.run(command, capture_output=True, text=True, check=False)
    if result.returncode != 0:
        raise SystemExit(f"child {kind} {words} failed:\n{result.stdout[-3000:]}\n{result.stderr[-3000:]}")
    return json.loads(result.stdout.strip().splitlines()[-1])


def fitted_estimates(project: Path) -> tuple[list[float], int]:
    """The coefficients and the passes over the data written in the fitted file."""
    import yaml

    fitted = yaml.safe_load((project / "fitted" / f"{MODEL}.yaml").read_text())
    return [term["estimate"] for term in fitted["terms"]], int(fitted["fit"].get("passes", 0))


def commands(path: Path, folder: Path, repeat: int, compute_only: bool = False) -> None:
    """Time `featpipe compute` and `featpipe fit` against their references; print ratios beside the goals."""
    project = write_project(folder, path)
    runs: dict[str, list[dict]] = {"create": [], "compute": [], "fit": [], "sklearn": []}
    for _ in range(repeat):  # interleaved, so a busy spell on the machine hits every route
        runs["create"].append(run_command_child("create", project, path))
        shutil.rmtree(project / "build", ignore_errors=True)  # compute from an empty engine file
        runs["compute"].append(run_command_child("command", project, path, "compute"))
        if not compute_only:
            runs["fit"].append(run_command_child("command", project, path, "fit"))
            runs["sklearn"].append(run_command_child("project-sklearn", project, path))
    best = {name: min(results, key=lambda result: result["seconds"]) for name, results in runs.items() if results}
    if compute_only:
        print_compute(runs, best, repeat)
        return
    estimates, passes = fitted_estimates(project)
    sklearn = best["sklearn"]
    print(f"training rows: {sklearn['rows']:,}; ", end="")
    print_table(runs, best, repeat, [("featpipe fit", "fit"), ("pandas fetch + scikit-learn", "sklearn")])
    print(f"  (scikit-learn: fetch {sklearn['fetch_seconds']:.2f} s, fit {sklearn['seconds'] - sklearn['fetch_seconds']:.2f} s; "
          f"featpipe fit: {passes} passes over the training rows)")
    print()
    print_compute_ratios(best)
    print(f"time   featpipe fit / (fetch + scikit-learn): {best['fit']['seconds'] / sklearn['seconds']:.3f}   (goal <= 0.5)")
    print(f"memory featpipe fit / (fetch + scikit-learn): {best['fit']['peak_rss_mb'] / sklearn['peak_rss_mb']:.3f}   (goal <= 0.2)")
    print(f"coefficients, max relative difference: featpipe fit vs scikit-learn "
          f"{max_relative_difference(estimates, sklearn['coef']):.2e}   (goal <= 1e-6)")


COMPUTE_LABELS = [("DuckDB CREATE TABLE AS from the file", "create"), ("featpipe compute", "compute")]


def print_table(runs: dict[str, list[dict]], best: dict[str, dict], repeat: int, more: list[tuple[str, str]]) -> None:
    """Seconds, CPU seconds and peak RSS of the fastest run of each route, with every run's seconds."""
    print(f"fastest of {repeat} interleaved run(s) each; load average at the end {os.getloadavg()[0]:.1f}\n")
    header = f"{'':40}{'seconds':>9}{'CPU s':>8}{'peak RSS MB':>13}   all runs (s)"
    print(header)
    print("-" * len(header))
    for label, name in COMPUTE_LABELS + more:
        every = ", ".join(f"{run['seconds']:.1f}" for run in runs[name])
        cpu = f"{best[name]['cpu_seconds']:8.2f}" if "cpu_seconds" in best[name] else f"{'':8}"
        print(f"{label:40}{best[name]['seconds']:9.2f}{cpu}{best[name]['peak_rss_mb']:13.0f}   {every}")


def print_compute_ratios(best: dict[str, dict]) -> None:
    compute, create = best["compute"], best["create"]
    print(f"time   featpipe compute / CREATE TABLE AS: {compute['seconds'] / create['seconds']:.3f}   (goal <= 2)")
    print(f"CPU    featpipe compute / CREATE TABLE AS: {compute['cpu_seconds'] / create['cpu_seconds']:.3f}   "
          "(same runs; steadier on a busy machine)")


def print_compute(runs: dict[str, list[dict]], best: dict[str, dict], repeat: int) -> None:
    print_table(runs, best, repeat, [])
    print()
    print_compute_ratios(best)


def max_relative_difference(a, b) -> float:
    a, b = np.asarray(a), np.asarray(b)
    return float(np.max(np.abs(a - b) / np.maximum(np.abs(b), 1e-12)))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000, help="rows of the design table (30%% are held out)")
    parser.add_argument("--keep", type=Path, help="DuckDB file to build (or reuse when it has --rows rows) and keep")
    parser.add_argument("--repeat", type=int, default=1, help="interleaved runs of each competitor; the fastest is shown")
    parser.add_argument("--commands", action="store_true",
                        help="time `featpipe compute` and `featpipe fit` as a user runs them (see above)")
    parser.add_argument("--compute-only", action="store_true", help="with --commands: time only `featpipe compute`")
    parser.add_argument("--child", choices=["featpipe", "sklearn", "command", "create", "project-sklearn"], help=argparse.SUPPRESS)
    parser.add_argument("--source", default="auto", help=argparse.SUPPRESS)
    parser.add_argument("--db", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--project", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--words", default="", help=argparse.SUPPRESS)
    arguments = parser.parse_args()
    children = {
        "command": lambda: child_command(arguments.project, arguments.words),
        "create": lambda: child_create_table(arguments.project, arguments.db),
        "project-sklearn": lambda: child_project_sklearn(arguments.project),
    }
    if arguments.child in children:
        result = children[arguments.child]()
        print(json.dumps(result))
        return
    if arguments.child == "featpipe":
        print(json.dumps(child_featpipe(arguments.db, arguments.source)))
        return
    if arguments.child == "sklearn":
        print(json.dumps(child_sklearn(arguments.db)))
        return

    print(machine_context(PACKAGES), flush=True)
    with tempfile.TemporaryDirectory() as folder:
        path = arguments.keep or Path(folder) / "bench.duckdb"
        started = time.perf_counter()
        build_table(path, arguments.rows)
        print(f"design table: {arguments.rows:,} rows x {len(layout().terms)} terms in {path} "
              f"(built or reused in {time.perf_counter() - started:.1f} s)")
        if arguments.commands:
            commands(path, Path(folder), arguments.repeat, arguments.compute_only)
            return
        runs: dict[str, list[dict]] = {"stream": [], "sql": [], "sklearn": []}
        for _ in range(arguments.repeat):  # interleaved, so a busy spell on the machine hits all three
            runs["stream"].append(run_child("featpipe", path, "stream"))
            runs["sql"].append(run_child("featpipe", path, "sql"))
            runs["sklearn"].append(run_child("sklearn", path))
    best = {name: min(results, key=lambda result: result["seconds"]) for name, results in runs.items()}
    stream, aggregate, sklearn = best["stream"], best["sql"], best["sklearn"]

    print(f"training rows: {stream['rows']:,} (scikit-learn: {sklearn['rows']:,}); "
          f"fastest of {arguments.repeat} interleaved run(s) each; load average at the end {os.getloadavg()[0]:.1f}\n")
    header = f"{'':34}{'seconds':>9}{'peak RSS MB':>13}{'RSS at start':>14}{'passes':>8}{'iterations':>12}   all runs (s)"
    print(header)
    print("-" * len(header))
    rows = [
        ("featpipe (DuckDB stream, default)", "stream"),
        ("featpipe (SQL aggregates)", "sql"),
        ("pandas fetch + scikit-learn", "sklearn"),
    ]
    for label, name in rows:
        result = best[name]
        every = ", ".join(f"{run['seconds']:.1f}" for run in runs[name])
        print(f"{label:34}{result['seconds']:9.2f}{result['peak_rss_mb']:13.0f}{result['start_rss_mb']:14.0f}"
              f"{result['passes']:8d}{result['iterations']:12d}   {every}")
    print(f"  (scikit-learn: fetch {sklearn['fetch_seconds']:.2f} s, fit {sklearn['seconds'] - sklearn['fetch_seconds']:.2f} s)")
    print()
    print(f"time   featpipe / (fetch + scikit-learn): {stream['seconds'] / sklearn['seconds']:.3f}   (target <= 0.5)")
    print(f"memory featpipe / (fetch + scikit-learn): {stream['peak_rss_mb'] / sklearn['peak_rss_mb']:.3f}   (target <= 0.2)")
    print(f"time   SQL aggregates / (fetch + scikit-learn): {aggregate['seconds'] / sklearn['seconds']:.3f}")
    print(f"memory SQL aggregates / (fetch + scikit-learn): {aggregate['peak_rss_mb'] / sklearn['peak_rss_mb']:.3f}")
    print(f"coefficients, max relative difference: featpipe vs scikit-learn {max_relative_difference(stream['coef'], sklearn['coef']):.2e}, "
          f"stream vs SQL aggregates {max_relative_difference(stream['coef'], aggregate['coef']):.2e}")


if __name__ == "__main__":
    main()
