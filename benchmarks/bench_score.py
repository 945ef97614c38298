"""Batch scoring: the exported scoring SQL in DuckDB vs pandas + scikit-learn, on the same Parquet rows.

    .venv/bin/python benchmarks/bench_score.py --rows 2000000
    .venv/bin/python benchmarks/bench_score.py --rows 10000000 --work build/bench_score   # keeps the Parquet file

A seeded, invented lease table (payment, revenue with 1% missing and a few zeros, firm age, term,
late payments, sector, employees) is written to Parquet. The model has 20 terms (ratios, logs, caps,
indicators, interactions, a square), compiled by featpipe from a term file like a project's; the
coefficients are invented. Each route runs in its own subprocess, so each peak RSS
(getrusage(RUSAGE_SELF).ru_maxrss in the child) is its own; the time is the work after imports:

- sql: the scoring query exported by featpipe, run by the duckdb package alone (no featpipe in the
  child) over read_parquet, writing key, prediction, linear predictor and status into an in-memory
  table: what a next step (a join, an export) reads. Not into a database file: writing the file costs
  more than scoring and is not what the comparison is about;
- sql, contributions: the whole scoring output, with one contribution column per term;
- sql, 3 reasons: the same with three reason codes (ranks by CASE comparisons: 20 x 19 per row);
- pandas: read the Parquet file into pandas, compute the 20 terms with numpy, predict the complete rows
  with scikit-learn's LogisticRegression (coef_ and intercept_ set to the same coefficients), giving a
  frame of key and prediction.

Printed side by side: seconds, rows per second, peak RSS, the ratios against the pandas route, and a
check that both routes agree (rows scored, relative difference of the sums of predictions).
Target: the SQL at least 6 times the pandas route's throughput with at most a quarter of its memory.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

SEED = 20240612
CHUNK_ROWS = 1_000_000
ROW_GROUP_ROWS = 122_880  # DuckDB's own row group size: readers split the file across threads by row group
SECTORS = ["construction", "retail", "logistics", "food_service", "manufacturing", "health"]

TERMS_SQL = """\
-- Terms of the benchmark lease model (invented).
SELECT
  monthly_payment / NULLIF(monthly_revenue, 0) AS payment_to_revenue,
  CASE WHEN firm_age_years < 2 THEN 1 ELSE 0 END AS young_firm,
  payment_to_revenue * young_firm AS young_and_stretched,
  LN(CASE WHEN monthly_revenue > 0 THEN monthly_revenue END) AS log_revenue,
  CASE WHEN firm_age_years > 20 THEN 20 ELSE firm_age_years END AS firm_age_capped,
  LEAST(past_late_payments, 3) AS late_payments_capped,
  CASE WHEN past_late_payments > 0 THEN 1 ELSE 0 END AS any_late_payment,
  CASE WHEN past_late_payments >= 3 THEN 1 ELSE 0 END AS repeat_late_payer,
  CASE WHEN sector = 'construction' THEN 1 ELSE 0 END AS sector_construction,
  CASE WHEN sector = 'food_service' THEN 1 ELSE 0 END AS sector_food_service,
  CASE WHEN sector = 'health' THEN 1 ELSE 0 END AS sector_health,
  CASE WHEN sector = 'retail' THEN 1 ELSE 0 END AS sector_retail,
  CASE WHEN term_months >= 48 THEN 1 ELSE 0 END AS long_term,
  term_months / 12.0 AS term_years,
  monthly_payment / NULLIF(employees, 0) AS payment_per_employee,
  LN(CASE WHEN employees > 0 THEN employees END) AS log_employees,
  monthly_revenue / NULLIF(employees, 0) / 1000.0 AS revenue_per_employee_k,
  POWER(payment_to_revenue, 2) AS payment_to_revenue_sq,
  firm_age_capped * late_payments_capped AS age_by_late
FROM leases
"""
# Term name -> invented coefficient; firm_age_years is an input column used directly as a term.
COEFFICIENTS = {
    "payment_to_revenue": 2.1, "young_firm": 0.35, "young_and_stretched": 1.4, "log_revenue": -0.12,
    "firm_age_years": -0.02, "firm_age_capped": -0.015, "late_payments_capped": 0.28, "any_late_payment": 0.2,
    "repeat_late_payer": 0.15, "sector_construction": 0.3, "sector_food_service": 0.25, "sector_health": -0.3,
    "sector_retail": 0.05, "long_term": 0.1, "term_years": 0.04, "payment_per_employee": 0.0004,
    "log_employees": -0.05, "revenue_per_employee_k": -0.01, "payment_to_revenue_sq": -0.8, "age_by_late": -0.005,
}
INTERCEPT_VALUE = -2.4
PROJECT_YAML = """\
name: bench
engine: {kind: duckdb, path: build/bench.duckdb}
inputs:
  leases:
    key: lease_id
    columns:
      lease_id: BIGINT
      monthly_payment: DOUBLE
      monthly_revenue: DOUBLE
      firm_age_years: DOUBLE
      term_months: BIGINT
      past_late_payments: BIGINT
      sector: VARCHAR
      employees: BIGINT
      defaulted_12m: BIGINT
"""


# --- preparation (parent) -------------------------------------------------------------------------


def write_leases(path: Path, rows: int) -> None:
    """The invented lease table, written chunk by chunk so the parent never holds all of it."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(SEED)
    writer = None
    for start in range(0, rows, CHUNK_ROWS):
        n = min(CHUNK_ROWS, rows - start)
        revenue = np.round(rng.lognormal(10.0, 0.8, n), 2)
        revenue[rng.random(n) < 0.002] = 0.0
        payment = np.round(revenue * rng.uniform(0.02, 0.3, n), 2)
        revenue_mask = rng.random(n) < 0.01
        chunk = pa.table({
            "lease_id": pa.array(np.arange(start + 1, start + n + 1), pa.int64()),
            "monthly_payment": pa.array(payment, pa.float64()),
            "monthly_revenue": pa.array(revenue, pa.float64(), mask=revenue_mask),
            "firm_age_years": pa.array(np.round(rng.gamma(2.0, 4.0, n), 1), pa.float64()),
            "term_months": pa.array(rng.choice([24, 36, 48, 60], n), pa.int64()),
            "past_late_payments": pa.array(rng.poisson(0.6, n), pa.int64()),
            "sector": pa.array(np.array(SECTORS, dtype=object)[rng.integers(0, len(SECTORS), n)], pa.string()),
            "employees": pa.array(rng.integers(1, 250, n), pa.int64()),
            "defaulted_12m": pa.array(rng.integers(0, 2, n), pa.int64()),
        })
        if writer is None:
            writer = pq.ParquetWriter(path, chunk.schema)
        writer.write_table(chunk, row_group_size=ROW_GROUP_ROWS)
    writer.close()


def scoring_model(work: Path):
    """The scoring query's model from the benchmark project's compiled terms and the invented coefficients."""
    import textwrap

    from featpipe.compiler import compile_project
    from featpipe.project import load_project
    from featpipe.sqlgen.score import ScoringModel, ScoringTerm

    root = work / "project"
    (root / "terms").mkdir(parents=True, exist_ok=True)
    (root / "specs").mkdir(exist_ok=True)
    (root / "featpipe.yaml").write_text(PROJECT_YAML)
    (root / "terms" / "leases.sql").write_text(TERMS_SQL)
    (root / "specs" / "bench.yaml").write_text(textwrap.dedent(f"""\
        input: leases
        target: defaulted_12m
        family: binomial
        terms: [{", ".join(COEFFICIENTS)}]
        """))
    compiled = compile_project(load_project(root))
    # The training means only centre the contributions.
    terms = tuple(ScoringTerm(t.name, t.sql, t.kind == "boolean", COEFFICIENTS[t.name], 0.5)
                  for t in compiled.models["bench"].terms)
    return ScoringModel(key="lease_id", table="leases", family="binomial", intercept=INTERCEPT_VALUE, offset=None,
                        columns=compiled.project.inputs["leases"].columns, terms=terms, source="benchmarks/bench_score.py")


def sql_jobs(model, parquet: Path) -> dict[str, list[str]]:
    """Statements each SQL child runs: a view over the Parquet file, the scoring table, a checksum."""
    from sqlglot import exp

    from featpipe.project.names import LINEAR_PREDICTOR, PREDICTION, STATUS
    from featpipe.sqlgen.common import column, render
    from featpipe.sqlgen.score import score_query

    reader = exp.Anonymous(this="read_parquet", expressions=[exp.Literal.string(str(parquet))])
    view = exp.Create(this=exp.to_table("leases"), kind="VIEW", expression=exp.select(exp.Star()).from_(reader))
    checksum = exp.select(
        exp.Count(this=column(PREDICTION)), exp.Sum(this=column(PREDICTION)),
    ).from_(exp.to_table("scores"))

    def job(query: exp.Query) -> list[str]:
        scores = exp.Create(this=exp.to_table("scores"), kind="TABLE", expression=query)
        return [render(statement, "duckdb") for statement in (view, scores, checksum)]

    lean = exp.select(*(column(name) for name in (model.key, PREDICTION, LINEAR_PREDICTOR, STATUS))).from_(
        score_query(model).subquery("scored"))
    return {"sql": job(lean), "sql, contributions": job(score_query(model)),
            "sql, 3 reasons": job(score_query(model, reasons=3))}


# --- the routes (children) ------------------------------------------------------------------------


def run_sql(statements: list[str]) -> dict:
    import duckdb

    connection = duckdb.connect()  # in memory: the scores table lives in RAM, as a next step would read it
    view, scores, checksum = statements
    connection.execute(view)
    start = time.perf_counter()
    connection.execute(scores)
    seconds = time.perf_counter() - start
    scored, total = connection.execute(checksum).fetchone()
    return {"seconds": seconds, "scored": scored, "sum": total}


def run_pandas(parquet: str) -> dict:
    import numpy as np
    import pandas as pd
    from sklearn.linear_model import LogisticRegression

    names = list(COEFFICIENTS)
    model = LogisticRegression()
    model.classes_ = np.array([0, 1])
    model.coef_ = np.array([[COEFFICIENTS[name] for name in names]])
    model.intercept_ = np.array([INTERCEPT_VALUE])
    model.n_features_in_ = len(names)

    start = time.perf_counter()
    frame = pd.read_parquet(parquet)
    payment = frame["monthly_payment"].to_numpy(float)
    revenue = frame["monthly_revenue"].to_numpy(float, na_value=np.nan)
    age = frame["firm_age_years"].to_numpy(float)
    term = frame["term_months"].to_numpy(float)
    late = frame["past_late_payments"].to_numpy(float)
    employees = frame["employees"].to_numpy(float)
    sector = frame["sector"]

    def ratio(a, b):
        return np.divide(a, b, out=np.full(len(a), np.nan), where=b != 0)

    def log_positive(x):
        return np.log(x, out=np.full(len(x), np.nan), where=x > 0)

    with np.errstate(invalid="ignore"):
        payment_to_revenue = ratio(payment, revenue)
        young = (age < 2).astype(float)
        age_capped = np.where(age > 20, 20.0, age)
        late_capped = np.minimum(late, 3.0)
        terms = {
            "payment_to_revenue": payment_to_revenue, "young_firm": young,
            "young_and_stretched": payment_to_revenue * young, "log_revenue": log_positive(revenue),
            "firm_age_years": age, "firm_age_capped": age_capped, "late_payments_capped": late_capped,
            "any_late_payment": (late > 0).astype(float), "repeat_late_payer": (late >= 3).astype(float),
            "sector_construction": (sector == "construction").to_numpy(float),
            "sector_food_service": (sector == "food_service").to_numpy(float),
            "sector_health": (sector == "health").to_numpy(float),
            "sector_retail": (sector == "retail").to_numpy(float),
            "long_term": (term >= 48).astype(float), "term_years": term / 12.0,
            "payment_per_employee": ratio(payment, employees), "log_employees": log_positive(employees),
            "revenue_per_employee_k": ratio(revenue, employees) / 1000.0,
            "payment_to_revenue_sq": payment_to_revenue**2, "age_by_late": age_capped * late_capped,
        }
    design = np.column_stack([terms[name] for name in names])
    complete = ~np.isnan(design).any(axis=1)
    prediction = np.full(len(frame), np.nan)
    prediction[complete] = model.predict_proba(design[complete])[:, 1]
    scores = pd.DataFrame({"lease_id": frame["lease_id"].to_numpy(), "prediction": prediction})
    seconds = time.perf_counter() - start
    return {"seconds": seconds, "scored": int(complete.sum()), "sum": float(np.nansum(scores["prediction"]))}


def child(route: str, job_file: str) -> None:
    job = json.loads(Path(job_file).read_text())
    result = run_pandas(job["parquet"]) if route == "pandas" else run_sql(job["statements"][route])
    result["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux
    print(json.dumps(result))


# --- driver ---------------------------------------------------------------------------------------


def measure(route: str, job_file: Path, repeat: int) -> dict:
    """The fastest of `repeat` runs, with the largest peak RSS seen."""
    runs = []
    for _ in range(repeat):
        done = subprocess.run([sys.executable, __file__, "--child", route, "--job", str(job_file)],
                              capture_output=True, text=True)
        if done.returncode != 0:
            sys.exit(f"the {route} route failed:\n{done.stderr}")
        runs.append(json.loads(done.stdout.strip().splitlines()[-1]))
    best = min(runs, key=lambda run: run["seconds"])
    return {**best, "peak_rss_mb": max(run["peak_rss_mb"] for run in runs)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--repeat", type=int, default=1, help="runs per route; the fastest is reported")
    parser.add_argument("--work", type=Path, help="folder for the Parquet file (kept and reused); default: a temporary one")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    parser.add_argument("--job", help=argparse.SUPPRESS)
    arguments = parser.parse_args()
    if arguments.child:
        child(arguments.child, arguments.job)
        return

    with tempfile.TemporaryDirectory(prefix="bench_score_") as temporary:
        work = arguments.work or Path(temporary)
        work.mkdir(parents=True, exist_ok=True)
        parquet = work / f"leases_{arguments.rows}.parquet"
        if not parquet.is_file():
            print(f"writing {arguments.rows:,} invented leases to {parquet} ...", flush=True)
            write_leases(parquet, arguments.rows)
        job_file = work / "job.json"
        job_file.write_text(json.dumps({"parquet": str(parquet), "statements": sql_jobs(scoring_model(work), parquet)}))

        routes = ("sql", "sql, contributions", "sql, 3 reasons", "pandas")
        results = {route: measure(route, job_file, arguments.repeat) for route in routes}

    rows = arguments.rows
    print(f"\nscoring {rows:,} rows, {len(COEFFICIENTS)} terms, binomial; {os.cpu_count()} cores; "
          f"best of {arguments.repeat}\n")
    print(f"{'route':<19} {'seconds':>9} {'rows/s':>14} {'peak RSS MB':>12} {'speed vs pandas':>16} {'memory vs pandas':>17}")
    pandas = results["pandas"]
    for route, result in results.items():
        speed = pandas["seconds"] / result["seconds"]
        memory = result["peak_rss_mb"] / pandas["peak_rss_mb"]
        print(f"{route:<19} {result['seconds']:>9.2f} {rows / result['seconds']:>14,.0f} {result['peak_rss_mb']:>12,.0f} "
              f"{speed:>15.2f}x {memory:>16.3f}x")
    sql = results["sql"]
    difference = abs(sql["sum"] - pandas["sum"]) / abs(pandas["sum"])
    print(f"\nrows scored: sql {sql['scored']:,}, pandas {pandas['scored']:,}; "
          f"relative difference of the prediction sums {difference:.1e}")
    speed, memory = pandas["seconds"] / sql["seconds"], sql["peak_rss_mb"] / pandas["peak_rss_mb"]
    print(f"target: throughput >= 6x pandas: {speed:.2f}x ({'met' if speed >= 6 else 'NOT met'}); "
          f"memory <= 1/4 of pandas: {memory:.3f} ({'met' if memory <= 0.25 else 'NOT met'})")


if __name__ == "__main__":
    main()
