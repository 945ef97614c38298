"""Choose an l2 penalty by 5-fold cross-validation: `featpipe fit` against the same search with pandas + scikit-learn.

    .venv/bin/python benchmarks/bench_crossval.py --rows 1000000
    .venv/bin/python benchmarks/bench_crossval.py --rows 1000000 --repeat 2 --grouped

The rows are bench_fit.py's seeded design table (25 terms, binomial), written to a parquet file that a
project loads (bench_fit.write_project: all rows for training), and the spec adds `folds: 5` and
`penalty: {l2: cv}`. After one `featpipe compute`, each route runs in its own child process with its
own peak RSS, interleaved with --repeat (the fastest run of each is shown):

- featpipe fit: the command as a user runs it. It fits the five folds on each strength of its grid
  (featpipe.fitting.crossval.L2_GRID, strongest first), chooses by cross-validated deviance, fits the
  model, and measures each fold's model on its own rows for the fitted file;
- featpipe fit, folds summed in SQL (with --grouped): the same command with each pass over the folds
  one aggregate query grouped by fold, the route Spark takes (and DuckDB took before its folds were
  streamed);
- pandas + scikit-learn: fetch the training rows with their fold (featpipe's assignment, so both search
  the same folds), standardize by the training mean and population sd, then per fold
  LogisticRegression(solver="newton-cholesky", C = 1 / (l2 n), warm started down the same grid) on
  the other folds' n rows, summing the held-out deviance (twice scikit-learn's log loss); then one fit
  of every row at the chosen strength. Its C is featpipe's l2 on the standardized scale (the same
  minimum, see tests/test_splits.py).

Printed: the package versions, core count and load average (benchmarks/context.py), seconds, CPU
seconds and peak RSS per route with every run, the ratio to scikit-learn, each route's chosen strength
and how far the cross-validated deviances of the grid are from scikit-learn's.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

import bench_fit
from context import machine_context

ROUTES = {"fit": "featpipe fit", "grouped": "featpipe fit, folds summed in SQL", "sklearn": "pandas + scikit-learn"}
CROSS_VALIDATED = "folds: 5\npenalty: {l2: cv}\n"


def child_grouped(project: Path) -> dict:
    """`featpipe fit` with the folds' passes as aggregates grouped by fold, as on an engine without a batch route."""
    from featpipe.fitting import crossval

    crossval.AUTO_SOURCES = {}
    return bench_fit.child_command(project, "fit")


def child_sklearn(project: Path) -> dict:
    import featpipe
    from sklearn.linear_model import LogisticRegression
    from sklearn.metrics import log_loss

    from featpipe.engines.duckdb import DuckDBEngine
    from featpipe.fitting.crossval import L2_GRID
    from featpipe.sqlgen.common import alias
    from featpipe.sqlgen.crossval import fold_number
    from featpipe.sqlgen.statistics import design_columns_query

    model = featpipe.check(featpipe.load_project(project)).models[bench_fit.MODEL]
    design, spec = model.layout, model.spec
    engine = DuckDBEngine(project / "build" / "bench.duckdb", read_only=True)
    started, cpu = time.perf_counter(), bench_fit.cpu_seconds()
    query = design_columns_query(design).select(alias(fold_number(design.key, spec.holdout.salt, spec.folds), "_fold"))
    frame = engine.fetch_frame(query)
    x, y, fold = frame[list(design.terms)].to_numpy(), frame["_y"].to_numpy(), frame["_fold"].to_numpy()
    del frame
    x = (x - x.mean(axis=0)) / x.std(axis=0)
    deviances = np.zeros(len(L2_GRID))
    for index in range(spec.folds):
        inside = fold == index
        x_out, y_out = x[~inside], y[~inside]
        classifier = LogisticRegression(solver="newton-cholesky", warm_start=True)
        for position, l2 in enumerate(L2_GRID):
            classifier.set_params(C=1 / (l2 * len(y_out))).fit(x_out, y_out)
            deviances[position] += 2 * log_loss(y[inside], classifier.predict_proba(x[inside])[:, 1], normalize=False)
        del x_out, y_out
    chosen = L2_GRID[int(np.argmin(deviances))]
    LogisticRegression(solver="newton-cholesky", C=1 / (chosen * len(y))).fit(x, y)
    return {"seconds": time.perf_counter() - started, "cpu_seconds": bench_fit.cpu_seconds() - cpu,
            "peak_rss_mb": bench_fit.peak_rss_mb(), "chosen": chosen, "deviance": deviances.tolist()}


def run_child(kind: str, project: Path) -> dict:
    command = [sys.executable, __file__, "--child", kind, "--project", str(project)]
    result = subprocess.run(command, capture_output=True, text=True, check=False)
    if result.returncode != 0:
        raise SystemExit(f"child {kind} failed:\n{result.stdout[-3000:]}\n{result.stderr[-3000:]}")
    found = json.loads(result.stdout.strip().splitlines()[-1])
    if kind != "sklearn":  # the command wrote its choice into the fitted file
        import yaml

        choice = yaml.safe_load((project / "fitted" / f"{bench_fit.MODEL}.yaml").read_text())["crossval"]["l2"]
        found |= {"chosen": choice["chosen"], "deviance": choice["deviance"]}
    return found


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000, help="rows of the design table, all for training")
    parser.add_argument("--repeat", type=int, default=1, help="interleaved runs of each route; the fastest is shown")
    parser.add_argument("--grouped", action="store_true", help="also time the folds summed in SQL (slow: ~2 s a pass per 1M rows)")
    parser.add_argument("--child", choices=["fit", "grouped", "sklearn"], help=argparse.SUPPRESS)
    parser.add_argument("--project", type=Path, help=argparse.SUPPRESS)
    arguments = parser.parse_args()
    if arguments.child:
        children = {"fit": lambda: bench_fit.child_command(arguments.project, "fit"), "grouped": lambda: child_grouped(arguments.project),
                    "sklearn": lambda: child_sklearn(arguments.project)}
        print(json.dumps(children[arguments.child]()))
        return

    print(machine_context(bench_fit.PACKAGES), flush=True)
    with tempfile.TemporaryDirectory() as folder:
        database = Path(folder) / "bench.duckdb"
        bench_fit.build_table(database, arguments.rows)
        project = bench_fit.write_project(Path(folder), database)
        spec = project / "specs" / f"{bench_fit.MODEL}.yaml"
        spec.write_text(spec.read_text() + CROSS_VALIDATED)
        bench_fit.run_command_child("command", project, database, "compute")
        routes = [route for route in ROUTES if route != "grouped" or arguments.grouped]
        runs: dict[str, list[dict]] = {route: [] for route in routes}
        for _ in range(arguments.repeat):  # interleaved, so a busy spell on the machine hits every route
            for route in routes:
                runs[route].append(run_child(route, project))
    best = {route: min(results, key=lambda result: result["seconds"]) for route, results in runs.items()}
    sklearn = best["sklearn"]
    print(f"design table: {arguments.rows:,} rows x {len(bench_fit.layout().terms)} terms, 5 folds, "
          f"{len(sklearn['deviance'])} strengths; fastest of {arguments.repeat} interleaved run(s) each\n")
    header = f"{'':36}{'seconds':>9}{'CPU s':>8}{'peak RSS MB':>13}{'chosen l2':>11}   all runs (s)"
    print(header)
    print("-" * len(header))
    for route in routes:
        result = best[route]
        every = ", ".join(f"{run['seconds']:.1f}" for run in runs[route])
        print(f"{ROUTES[route]:36}{result['seconds']:9.2f}{result['cpu_seconds']:8.2f}{result['peak_rss_mb']:13.0f}"
              f"{result['chosen']:11g}   {every}")
    print()
    for route in routes[:-1]:
        ratio = best[route]["seconds"] / sklearn["seconds"]
        difference = bench_fit.max_relative_difference(best[route]["deviance"], sklearn["deviance"])
        print(f"{ROUTES[route]} / scikit-learn: time {ratio:.3f}; cross-validated deviances, max relative difference {difference:.1e}")


if __name__ == "__main__":
    main()
