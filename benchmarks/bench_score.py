"""Batch scoring: featpipe's exported scoring SQL in DuckDB vs pandas + scikit-learn, on the same Parquet rows.

    .venv/bin/python benchmarks/bench_score.py --rows 2000000
    .venv/bin/python benchmarks/bench_score.py --rows 10000000 --work build/bench_score   # keeps the Parquet files

A seeded, invented lease table (payment, revenue with 1% missing and a few zeros, firm age, term,
late payments, sector, employees) is written to Parquet; its default flag is drawn from a logistic
model with invented coefficients over 20 terms (ratios, logs, caps, indicators, interactions, a
square). The model scored is built as a user builds one: a project with those terms in a term file
and a spec, fitted by `featpipe.api.fit` on a training file of its own (--train-rows rows, another seed).
The scoring SQL is what `featpipe sql MODEL --part score` exports from the fitted file, and the
pandas route reads its coefficients from the same file, so the benchmark follows the fitted format
through the project's own code. Each route runs in its own subprocess, so each peak RSS (VmHWM,
benchmarks/memory.py, in the child) is its own; the time is the work after imports:

- sql: the exported scoring query, as a view, run by the duckdb package alone (no featpipe in the
  child) over read_parquet, writing key, prediction, linear predictor and status into an in-memory
  table: what a next step (a join, an export) reads. Not into a database file: writing the file costs
  more than scoring and is not what the comparison is about;
- sql, contributions: the whole scoring output, with one contribution column per term;
- sql, 3 reasons: the same with three reason codes (three rounds of GREATEST and comparisons, about
  3 x 20 operations a round per row);
- sql, lean reasons: the exported query with three reason codes, as a view, writing what the sql route
  writes plus the three reasons: the contributions are computed (the reasons read them) but not
  stored, so this is the reasons' own cost on top of the sql route;
- pandas: read the Parquet file into pandas, compute the 20 terms with numpy, predict the complete rows
  with scikit-learn's LogisticRegression (coef_ and intercept_ set to the fitted coefficients), giving
  a frame of key and prediction.

Printed: the package versions, core count and load average (benchmarks/context.py), then side by
side: seconds, rows per second, peak RSS, the ratios against the pandas route, and a check that both
routes agree (rows scored, relative difference of the sums of predictions).
Targets: the SQL at least 6 times the pandas route's throughput with at most a quarter of its memory;
with three reason codes at least 3 times (printed for the whole output and for the lean reasons).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from context import machine_context
from memory import peak_rss_mb

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

PACKAGES = ("featpipe", "duckdb", "sqlglot", "numpy", "pandas", "pyarrow", "scikit-learn")
SEED = 20240612
TRAIN_SEED = SEED + 1  # the training rows are other leases than the scored ones
CHUNK_ROWS = 1_000_000
ROW_GROUP_ROWS = 122_880  # DuckDB's own row group size: readers split the file across threads by row group
SECTORS = ["construction", "retail", "logistics", "food_service", "manufacturing", "health"]
MODEL = "bench"

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
# Term name -> invented coefficient of the logistic model that draws the default flag; the fit
# recovers them up to sampling error. firm_age_years is an input column used directly as a term.
TRUE_COEFFICIENTS = {
    "payment_to_revenue": 2.1, "young_firm": 0.35, "young_and_stretched": 1.4, "log_revenue": -0.12,
    "firm_age_years": -0.02, "firm_age_capped": -0.015, "late_payments_capped": 0.28, "any_late_payment": 0.2,
    "repeat_late_payer": 0.15, "sector_construction": 0.3, "sector_food_service": 0.25, "sector_health": -0.3,
    "sector_retail": 0.05, "long_term": 0.1, "term_years": 0.04, "payment_per_employee": 0.0004,
    "log_employees": -0.05, "revenue_per_employee_k": -0.01, "payment_to_revenue_sq": -0.8, "age_by_late": -0.005,
}
TRUE_INTERCEPT = -2.4
PROJECT_YAML = """\
name: bench
engine:
  kind: duckdb
  path: build/bench.duckdb
inputs:
  leases:
    key: lease_id
    load: {load}
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
SPEC_YAML = f"""\
input: leases
target: defaulted_12m
family: binomial
terms: [{", ".join(TRUE_COEFFICIENTS)}]
"""


# --- the model's terms in numpy (the pandas route's work, and the default flag's mechanism) --------


def lease_terms(columns) -> dict:
    """Each term of TERMS_SQL computed with numpy from a mapping of column name to values; NaN where
    the SQL gives NULL (a division by zero, the log of a non-positive number, a missing input)."""
    import numpy as np

    payment = np.asarray(columns["monthly_payment"], dtype=float)
    revenue = np.asarray(columns["monthly_revenue"], dtype=float)
    age = np.asarray(columns["firm_age_years"], dtype=float)
    term = np.asarray(columns["term_months"], dtype=float)
    late = np.asarray(columns["past_late_payments"], dtype=float)
    employees = np.asarray(columns["employees"], dtype=float)
    sector = np.asarray(columns["sector"], dtype=object)

    def ratio(a, b):
        return np.divide(a, b, out=np.full(len(a), np.nan), where=b != 0)

    def log_positive(x):
        return np.log(x, out=np.full(len(x), np.nan), where=x > 0)

    with np.errstate(invalid="ignore"):
        payment_to_revenue = ratio(payment, revenue)
        young = (age < 2).astype(float)
        age_capped = np.where(age > 20, 20.0, age)
        late_capped = np.minimum(late, 3.0)
        return {
            "payment_to_revenue": payment_to_revenue, "young_firm": young,
            "young_and_stretched": payment_to_revenue * young, "log_revenue": log_positive(revenue),
            "firm_age_years": age, "firm_age_capped": age_capped, "late_payments_capped": late_capped,
            "any_late_payment": (late > 0).astype(float), "repeat_late_payer": (late >= 3).astype(float),
            "sector_construction": (sector == "construction").astype(float),
            "sector_food_service": (sector == "food_service").astype(float),
            "sector_health": (sector == "health").astype(float),
            "sector_retail": (sector == "retail").astype(float),
            "long_term": (term >= 48).astype(float), "term_years": term / 12.0,
            "payment_per_employee": ratio(payment, employees), "log_employees": log_positive(employees),
            "revenue_per_employee_k": ratio(revenue, employees) / 1000.0,
            "payment_to_revenue_sq": payment_to_revenue**2, "age_by_late": age_capped * late_capped,
        }


# --- preparation (parent) -------------------------------------------------------------------------


def write_leases(path: Path, rows: int, seed: int) -> None:
    """The invented lease table, written chunk by chunk so the parent never holds all of it."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    types = {"lease_id": pa.int64(), "monthly_payment": pa.float64(), "monthly_revenue": pa.float64(),
             "firm_age_years": pa.float64(), "term_months": pa.int64(), "past_late_payments": pa.int64(),
             "sector": pa.string(), "employees": pa.int64(), "defaulted_12m": pa.int64()}
    rng = np.random.default_rng(seed)
    writer = None
    for start in range(0, rows, CHUNK_ROWS):
        n = min(CHUNK_ROWS, rows - start)
        revenue = np.round(rng.lognormal(10.0, 0.8, n), 2)
        revenue[rng.random(n) < 0.002] = 0.0
        payment = np.round(revenue * rng.uniform(0.02, 0.3, n), 2)
        revenue[rng.random(n) < 0.01] = np.nan  # not reported: NULL in the file
        columns = {
            "lease_id": np.arange(start + 1, start + n + 1),
            "monthly_payment": payment,
            "monthly_revenue": revenue,
            "firm_age_years": np.round(rng.gamma(2.0, 4.0, n), 1),
            "term_months": rng.choice([24, 36, 48, 60], n),
            "past_late_payments": rng.poisson(0.6, n),
            "sector": np.array(SECTORS, dtype=object)[rng.integers(0, len(SECTORS), n)],
            "employees": rng.integers(1, 250, n),
        }
        terms = lease_terms(columns)
        eta = TRUE_INTERCEPT + sum(coefficient * terms[name] for name, coefficient in TRUE_COEFFICIENTS.items())
        chance = 1.0 / (1.0 + np.exp(-np.nan_to_num(eta, nan=TRUE_INTERCEPT)))
        columns["defaulted_12m"] = (rng.random(n) < chance).astype(np.int64)
        chunk = pa.table({name: pa.array(values, types[name], from_pandas=True) for name, values in columns.items()})
        if writer is None:
            writer = pq.ParquetWriter(path, chunk.schema)
        writer.write_table(chunk, row_group_size=ROW_GROUP_ROWS)
    writer.close()


def fit_model(root: Path, train_rows: int):
    """The benchmark project in `root`, fitted with the public API on `train_rows` invented leases."""
    from featpipe import api

    train = root / "data" / f"train_{train_rows}.parquet"
    if not train.is_file():
        train.parent.mkdir(parents=True, exist_ok=True)
        write_leases(train, train_rows, TRAIN_SEED)
    for relative, text in {"featpipe.yaml": PROJECT_YAML.format(load=train.relative_to(root)),
                           "terms/leases.sql": TERMS_SQL, f"specs/{MODEL}.yaml": SPEC_YAML}.items():
        (root / relative).parent.mkdir(parents=True, exist_ok=True)
        (root / relative).write_text(text, encoding="utf-8")
    project = api.load_project(root)
    (outcome,) = api.fit(project, [MODEL])
    return project, outcome.fitted


def sql_jobs(project, parquet: Path) -> dict[str, dict]:
    """Per SQL route: the untimed set-up (a view `leases` over the Parquet file, for the lean route the
    exported query as a view), the timed statement writing table `scores`, and a checksum query."""
    from sqlglot import exp

    from featpipe.fitted.scoring import render_score_sql
    from featpipe.project.names import LINEAR_PREDICTOR, PREDICTION, STATUS, reason_column
    from featpipe.sqlgen.common import column, render

    reader = exp.Anonymous(this="read_parquet", expressions=[exp.Literal.string(str(parquet))])
    leases = render(exp.Create(this=exp.to_table("leases"), kind="VIEW", expression=exp.select(exp.Star()).from_(reader)),
                    "duckdb")
    checksum = render(exp.select(exp.Count(this=column(PREDICTION)), exp.Sum(this=column(PREDICTION))).from_(exp.to_table("scores")),
                      "duckdb")
    key = project.inputs["leases"].key
    lean_columns = [key, PREDICTION, LINEAR_PREDICTOR, STATUS]

    def lean(*extra: str) -> str:
        query = exp.select(*(column(name) for name in (*lean_columns, *extra))).from_(exp.to_table("scored"))
        return render(exp.Create(this=exp.to_table("scores"), kind="TABLE", expression=query), "duckdb")

    return {
        "sql": {"setup": [leases, render_score_sql(project, MODEL, as_view="scored")], "score": lean(), "checksum": checksum},
        "sql, lean reasons": {"setup": [leases, render_score_sql(project, MODEL, reasons=3, as_view="scored")],
                              "score": lean(*(reason_column(rank) for rank in (1, 2, 3))), "checksum": checksum},
        "sql, contributions": {"setup": [leases], "score": render_score_sql(project, MODEL, into="scores"),
                               "checksum": checksum},
        "sql, 3 reasons": {"setup": [leases], "score": render_score_sql(project, MODEL, reasons=3, into="scores"),
                           "checksum": checksum},
    }


# --- the routes (children) ------------------------------------------------------------------------


def run_sql(job: dict) -> dict:
    import duckdb

    connection = duckdb.connect()  # in memory: the scores table lives in RAM, as a next step would read it
    for statement in job["setup"]:
        connection.execute(statement)
    start = time.perf_counter()
    connection.execute(job["score"])
    seconds = time.perf_counter() - start
    scored, total = connection.execute(job["checksum"]).fetchone()
    return {"seconds": seconds, "scored": scored, "sum": total}


def run_pandas(parquet: str, intercept: float, coefficients: dict[str, float]) -> dict:
    import numpy as np
    import pandas as pd
    from sklearn.linear_model import LogisticRegression

    names = list(coefficients)
    model = LogisticRegression()
    model.classes_ = np.array([0, 1])
    model.coef_ = np.array([[coefficients[name] for name in names]])
    model.intercept_ = np.array([intercept])
    model.n_features_in_ = len(names)

    start = time.perf_counter()
    frame = pd.read_parquet(parquet)
    terms = lease_terms(frame)
    design = np.column_stack([terms[name] for name in names])
    complete = ~np.isnan(design).any(axis=1)
    prediction = np.full(len(frame), np.nan)
    prediction[complete] = model.predict_proba(design[complete])[:, 1]
    scores = pd.DataFrame({"lease_id": frame["lease_id"].to_numpy(), "prediction": prediction})
    seconds = time.perf_counter() - start
    return {"seconds": seconds, "scored": int(complete.sum()), "sum": float(np.nansum(scores["prediction"]))}


def child(route: str, job_file: str) -> None:
    job = json.loads(Path(job_file).read_text())
    if route == "pandas":
        result = run_pandas(job["parquet"], job["intercept"], job["coefficients"])
    else:
        result = run_sql(job["sql"][route])
    result["peak_rss_mb"] = peak_rss_mb()
    print(json.dumps(result))


# --- driver ---------------------------------------------------------------------------------------


def measure(route: str, job_file: Path, repeat: int) -> dict:
    """The fastest of `repeat` runs, with the largest peak RSS seen."""
    runs = []
    for _ in range(repeat):
        done = subprocess.run([sys.executable, __file__, "--child", route, "--job", str(job_file)],
                              capture_output=True, text=True, check=False)
        if done.returncode != 0:
            sys.exit(f"the {route} route failed:\n{done.stderr}")
        runs.append(json.loads(done.stdout.strip().splitlines()[-1]))
    best = min(runs, key=lambda run: run["seconds"])
    return {**best, "peak_rss_mb": max(run["peak_rss_mb"] for run in runs)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10_000_000, help="rows scored")
    parser.add_argument("--train-rows", type=int, default=200_000, help="rows the model is fitted on (at most --rows)")
    parser.add_argument("--repeat", type=int, default=1, help="runs per route; the fastest is reported")
    parser.add_argument("--work", type=Path, help="folder for the Parquet files (kept and reused); default: a temporary one")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    parser.add_argument("--job", help=argparse.SUPPRESS)
    arguments = parser.parse_args()
    if arguments.child:
        child(arguments.child, arguments.job)
        return

    print(machine_context(PACKAGES), flush=True)
    with tempfile.TemporaryDirectory(prefix="bench_score_") as temporary:
        work = arguments.work or Path(temporary)
        work.mkdir(parents=True, exist_ok=True)
        parquet = work / f"leases_{arguments.rows}.parquet"
        if not parquet.is_file():
            print(f"writing {arguments.rows:,} invented leases to {parquet} ...", flush=True)
            write_leases(parquet, arguments.rows, SEED)
        started = time.perf_counter()
        project, fitted = fit_model(work / "project", min(arguments.train_rows, arguments.rows))
        print(f"fitted with featpipe.api.fit on {fitted.rows['train']:,} training rows in {time.perf_counter() - started:.1f} s "
              f"({fitted.fit['iterations']} IRLS iterations, converged: {fitted.fit['converged']})", flush=True)
        job_file = work / "job.json"
        job_file.write_text(json.dumps({
            "parquet": str(parquet), "sql": sql_jobs(project, parquet), "intercept": fitted.terms[0].estimate,
            "coefficients": {term.name: term.estimate for term in fitted.model_terms},
        }))

        routes = ("sql", "sql, contributions", "sql, 3 reasons", "sql, lean reasons", "pandas")
        results = {route: measure(route, job_file, arguments.repeat) for route in routes}

    rows = arguments.rows
    print(f"\nscoring {rows:,} rows, {len(fitted.model_terms)} terms, {fitted.family}; best of {arguments.repeat}\n")
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
    for route in ("sql, 3 reasons", "sql, lean reasons"):
        reasons = pandas["seconds"] / results[route]["seconds"]
        print(f"target: throughput with 3 reasons >= 3x pandas ({route}): {reasons:.2f}x ({'met' if reasons >= 3 else 'NOT met'})")


if __name__ == "__main__":
    main()
