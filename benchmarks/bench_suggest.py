"""`featpipe suggest` on a large input in DuckDB: how many scans of the training rows, and how long beside one scan.

    python benchmarks/bench_suggest.py --rows 1000000 --candidates 200

A seeded invented input (8 numeric columns, one text column with 6 levels, a 0/1 target whose log-odds
use a ratio of two columns) is generated inside DuckDB with SQL. A logistic model on four raw columns
is fitted with featpipe, then its candidates are tested; so are those of the same model with x4 as a
SPLINE and the text column as LEVELS (learned terms, expanded into 3 + 5 design columns in the sums).
Every query featpipe sends is counted; a query over the training rows without a LIMIT is a scan.
Printed side by side: each model's suggest time, the time of one plain scan reading every input
column, their ratios, the scans, and for the raw model's top candidate the score statistic against
statsmodels' score test on the same rows fetched into memory.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from sqlglot import exp

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from context import machine_context  # noqa: E402

from featpipe import api  # noqa: E402
from featpipe.engines.compute import connect  # noqa: E402
from featpipe.fitted import read_fitted  # noqa: E402
from featpipe.fitting.suggest import suggest  # noqa: E402
from featpipe.project import load_project  # noqa: E402
from featpipe.sqlgen.common import column  # noqa: E402

NUMERIC = 8
SEED = 20240917
PACKAGES = ("featpipe", "duckdb", "sqlglot", "numpy", "statsmodels")
RAW_TERMS = ("x1", "x2", "x3", "x4")
LEARNED_TERMS = "SELECT SPLINE(x4, 4) AS x4_curve, LEVELS(region, 30) AS region_level FROM cases\n"


def write_project(root: Path) -> None:
    columns = "".join(f"      x{j}: DOUBLE\n" for j in range(1, NUMERIC + 1))
    (root / "specs").mkdir(parents=True)
    (root / "featpipe.yaml").write_text(
        "name: bench\nengine:\n  kind: duckdb\n  path: build/bench.duckdb\ninputs:\n  cases:\n    key: id\n    columns:\n"
        f"      id: BIGINT\n{columns}      region: VARCHAR\n      y: BIGINT\n", encoding="utf-8")
    (root / "specs" / "raw.yaml").write_text(
        f"input: cases\ntarget: y\nfamily: binomial\nterms: [{', '.join(RAW_TERMS)}]\n", encoding="utf-8")
    (root / "terms").mkdir()
    (root / "terms" / "learned.sql").write_text(LEARNED_TERMS, encoding="utf-8")
    (root / "specs" / "learned.yaml").write_text(
        "input: cases\ntarget: y\nfamily: binomial\nterms: [x1, x2, x3, x4_curve, region_level]\n", encoding="utf-8")


def generate(engine, rows: int) -> None:
    """Uniform and normal columns from hashes of the row number (seeded, no Python loop)."""
    uniform = [f"((hash(i * {NUMERIC + 2} + {j} + {SEED}) % 1000000) + 0.5) / 1000000.0" for j in range(NUMERIC + 2)]
    values = [f"1 + 4 * {uniform[j]} AS x{j + 1}" for j in range(NUMERIC)]
    region = f"['north', 'south', 'east', 'west', 'centre', 'islands'][CAST(floor({uniform[NUMERIC]} * 6) AS INTEGER) + 1]"
    log_odds = "-2 + 3 * (x1 / x2) + 0.3 * x3"
    engine.connection.execute(f"""
        CREATE OR REPLACE TABLE cases AS
        SELECT id, {', '.join(f'x{j}' for j in range(1, NUMERIC + 1))}, region,
               CASE WHEN u < 1 / (1 + exp(-({log_odds}))) THEN 1 ELSE 0 END AS y
        FROM (SELECT i AS id, {', '.join(values)}, {region} AS region, {uniform[NUMERIC + 1]} AS u FROM range(1, {rows} + 1) t(i))
    """)


class Counting:
    """The engine, with every query counted and timed; queries without LIMIT read every training row."""

    def __init__(self, engine):
        self.engine, self.scans, self.samples, self.seconds = engine, 0, 0, 0.0

    def __getattr__(self, name):
        return getattr(self.engine, name)

    def fetch(self, query):
        started = time.perf_counter()
        rows = self.engine.fetch(query)
        self.seconds += time.perf_counter() - started
        if query.find(exp.Limit):
            self.samples += 1
        else:
            self.scans += 1
        return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--candidates", type=int, default=200)
    arguments = parser.parse_args()
    print(machine_context(PACKAGES))
    with tempfile.TemporaryDirectory() as folder:
        root = Path(folder)
        write_project(root)
        project = load_project(root)
        with connect(project) as engine:
            generate(engine, arguments.rows)
        api.fit(project, ["raw", "learned"])
        compiled = api.check(project)
        with connect(project) as engine:
            scan = exp.select(*(exp.Sum(this=column(f"x{j}")) for j in range(1, NUMERIC + 1)),
                              exp.Count(this=column("region")), exp.Sum(this=column("y"))).from_("cases")
            engine.fetch(scan)  # warm
            started = time.perf_counter()
            engine.fetch(scan)
            one_scan = time.perf_counter() - started
            runs = {}
            for name in ("raw", "learned"):
                counting = Counting(engine)
                started = time.perf_counter()
                report = suggest(counting, compiled, compiled.models[name], read_fitted(project.fitted_path(name)),
                                 top=5, max_candidates=arguments.candidates)
                runs[name] = (report, counting, time.perf_counter() - started)
            report = runs["raw"][0]
            top = report.suggestions[0]
            frame = engine.fetch_frame(exp.select(exp.Star()).from_("design_raw").where(exp.not_(column("_holdout"))))
            values = engine.fetch_frame(exp.select(column("id"), exp.alias_(exp.maybe_parse(top.sql, dialect="duckdb"), "c")).from_("cases"))
        reference = _statsmodels_statistic(frame.merge(values, on="id"))
        print(f"rows {arguments.rows:,}; training rows {report.training_rows:,}; one scan {one_scan:.3f} s")
        for name, (found, counting, seconds) in runs.items():
            print(f"model {name}: candidates generated {found.generated}, tested {found.tested}, "
                  f"dropped {sum(found.dropped.values())}; scans counted {counting.scans}, reported {found.scans} "
                  f"(target at most 3), LIMIT samples {counting.samples}; suggest {seconds:.2f} s "
                  f"(queries {counting.seconds:.2f} s), suggest / one scan {seconds / one_scan:.1f}x")
        print(f"learned / raw suggest time {runs['learned'][2] / runs['raw'][2]:.2f}x")
        print(f"top candidate {top.name}: score statistic featpipe {top.statistic:.6g}, statsmodels {reference:.6g}, "
              f"relative difference {abs(top.statistic - reference) / reference:.1e}")


def _statsmodels_statistic(frame) -> float:
    """statsmodels' score test for adding column c to the raw model, on the training rows in memory."""
    import statsmodels.api as sm

    frame = frame.dropna()
    X = sm.add_constant(frame[list(RAW_TERMS)].to_numpy(float))
    restricted = sm.GLM(frame["y"].to_numpy(float), X, family=sm.families.Binomial()).fit(tol=1e-13)
    return float(np.squeeze(restricted.score_test(exog_extra=frame[["c"]].to_numpy(float))[0]))


if __name__ == "__main__":
    main()
