"""Compute, fit and score the lease demo model on DuckDB, PostgreSQL and Spark, at growing row counts.

    .venv/bin/python benchmarks/bench_engines.py                                 # 1M rows, all three engines
    .venv/bin/python benchmarks/bench_engines.py --rows 1000000 10000000         # and 10M: memory ratio at 10x
    .venv/bin/python benchmarks/bench_engines.py --rows 100000 1000000 --engines duckdb postgres

The project is projects/lease_default (its term files and the 9-term model default_risk) with its
`load:` file removed: the input table `leases` is generated inside each engine by one SQL query over
the engine's row sequence (DuckDB range, PostgreSQL generate_series, Spark range), so no row passes
through Python. The invented rows follow the demo's generator in spirit (revenue log-normal with 1%
missing and a few zeros, payment a share of revenue, default from a logistic mechanism in the payment
share, firm age, late payments and sector); the pseudo-random numbers are BIGINT arithmetic modulo
the prime 2**31 - 1, which every engine computes alike.

Each engine x size runs in its own subprocesses: one generates the table, then one runs featpipe as
a user would (`compute`, `fit`, `score` through the API the CLI calls) and reports seconds per
step and its peak RSS, resource.getrusage(RUSAGE_SELF).ru_maxrss in that child. Linux carries a
parent's peak into a child's ru_maxrss, so this driver imports nothing but the standard library; the
PostgreSQL server (tests/fixtures_engines.PostgresServer, as the tests start it) runs from a helper
subprocess. The engines' own memory (the PostgreSQL server, Spark's JVM) is not the featpipe process
and is not counted: the point is that featpipe's memory stays flat as rows grow, because the data
stay in the engine. DuckDB is the exception: it runs inside the featpipe process, so its working
memory (up to its memory_limit, 80% of RAM by default) is in the figure; the peaks after compute
and after fit show which step grows. Printed: the package versions, core count and load average
(benchmarks/context.py), one line per engine x size, the peak RSS ratio between the largest and
smallest sizes per engine, and each engine's agreement with DuckDB on the same rows (training rows,
rows scored, how far its coefficients are from DuckDB's). Also, per engine x size, the seconds of one
aggregate scan of the design table (a SUM of every term and a COUNT, measured in the same child right
after the fit) and the fit's time as a multiple of it (goal: at most 4).
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from context import machine_context

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "projects" / "lease_default"
MODEL = "default_risk"
ENGINES = ("duckdb", "postgres", "spark")
PACKAGES = ("featpipe", "duckdb", "sqlglot", "psycopg", "pyspark")
DSN_VARIABLE = "FEATPIPE_BENCH_DSN"
PRIME = 2**31 - 1  # residues below it square to less than 2**62: no BIGINT overflow on any engine
SECTORS = (("construction", 0.20, 0.55), ("retail", 0.18, 0.15), ("logistics", 0.16, 0.10),
           ("food_service", 0.14, 0.70), ("manufacturing", 0.17, 0.0), ("health", 0.15, -0.55))


# ---------------------------------------------------------------- the table, as one SQL query per engine


def leases_query(rows: int, kind: str):
    """The invented `leases` input of `rows` rows, with the demo's contract columns, for engine `kind`."""
    from sqlglot import exp

    from featpipe.sqlgen.common import alias, column, double, number

    def integer(value: int) -> exp.Literal:
        return exp.Literal.number(value)

    def uniform(stream: int) -> exp.Expression:
        """In (0, 1): (key * a + b) mod p, then squared plus a constant mod p twice (not linear in the key)."""
        state = exp.Mod(this=exp.Paren(this=exp.Add(
            this=exp.Mul(this=column("i"), expression=integer(1_000_003)), expression=integer(12_345 + 7_919 * stream))),
            expression=integer(PRIME))
        for constant in (104_729 * stream + 1, 15_485_863 + stream):
            squared = exp.Mul(this=exp.Paren(this=state), expression=exp.Paren(this=state.copy()))
            state = exp.Mod(this=exp.Paren(this=exp.Add(this=squared, expression=integer(constant))), expression=integer(PRIME))
        return exp.Div(this=exp.Paren(this=exp.Add(this=double(state), expression=number(0.5))), expression=number(float(PRIME)))

    def normal(first: str, second: str) -> exp.Expression:
        """Box-Muller from two uniform columns."""
        radius = exp.Sqrt(this=exp.Mul(this=number(-2.0), expression=exp.Ln(this=column(first))))
        angle = exp.Mul(this=number(6.283185307179586), expression=column(second))
        return exp.Mul(this=radius, expression=exp.Anonymous(this="COS", expressions=[angle]))

    def rounded(value: exp.Expression, places: int) -> exp.Expression:
        scale = number(10.0**places)
        return exp.Div(this=double(exp.Floor(this=exp.Mul(this=value, expression=scale))), expression=scale.copy())

    def mul(*factors: exp.Expression) -> exp.Expression:
        result = factors[0]
        for factor in factors[1:]:
            result = exp.Mul(this=result, expression=factor)
        return result

    sequence = {
        "duckdb": exp.select(alias(column("range"), "i")).from_(exp.Anonymous(this="range", expressions=[integer(rows)])),
        "postgres": exp.select(alias(exp.cast(column("generate_series"), "BIGINT"), "i")).from_(
            exp.Anonymous(this="generate_series", expressions=[integer(0), integer(rows - 1)])),
        "spark": exp.select(alias(column("id"), "i")).from_(exp.Anonymous(this="range", expressions=[integer(rows)])),
    }[kind]
    draws = exp.select(column("i"), *(alias(uniform(k), f"u{k}") for k in range(1, 11))).from_(sequence.subquery("keys"))

    revenue = exp.Exp(this=exp.Add(this=number(10.308952660644293), expression=mul(number(0.75), normal("u2", "u3"))))
    share = exp.Exp(this=exp.Add(this=number(-2.5257286443082556), expression=mul(number(0.4), normal("u4", "u5"))))
    sector = exp.Case()
    bound = 0.0
    for name, portion, _shift in SECTORS:
        bound += portion
        sector = sector.when(exp.LT(this=column("u8"), expression=number(bound)), exp.Literal.string(name))
    sector = sector.else_(exp.Literal.string(SECTORS[-1][0]))
    raw = exp.select(
        alias(exp.Add(this=integer(100_000), expression=column("i")), "lease_id"),
        alias(rounded(mul(number(-7.2), exp.Ln(this=column("u1"))), 1), "firm_age_years"),
        alias(revenue, "_revenue"),
        alias(share, "_share"),
        alias(exp.cast(exp.Add(this=integer(24), expression=mul(integer(12), exp.Floor(this=mul(column("u7"), number(4.0))))), "BIGINT"),
              "term_months"),
        alias(sector, "sector"),
        alias(exp.cast(exp.Floor(this=mul(number(-0.7), exp.Ln(this=column("u9")))), "BIGINT"), "past_late_payments"),
        column("u6"),
        column("u10"),
    ).from_(draws.subquery("draws"))

    young = exp.Case().when(exp.LT(this=column("firm_age_years"), expression=number(2.0)), number(1.0)).else_(number(0.0))
    late = exp.Case().when(exp.GT(this=column("past_late_payments"), expression=integer(3)), number(3.0)).else_(
        double(column("past_late_payments")))
    shift = exp.Case()
    for name, _portion, effect in SECTORS:
        shift = shift.when(exp.EQ(this=column("sector"), expression=exp.Literal.string(name)), number(effect))
    shift = shift.else_(number(0.0))
    eta = number(-3.9)
    for term in (
        mul(number(9.0), column("_share")), mul(number(0.45), young), mul(number(14.0), column("_share"), young.copy()),
        mul(number(-0.035), column("firm_age_years")),
        mul(number(-0.25), exp.Ln(this=exp.Div(this=column("_revenue"), expression=number(30000.0)))),
        mul(number(0.45), late), shift,
    ):
        eta = exp.Add(this=eta, expression=term)
    chance = exp.Div(this=number(1.0), expression=exp.Paren(this=exp.Add(
        this=number(1.0), expression=exp.Exp(this=exp.Neg(this=exp.Paren(this=eta))))))
    revenue_as_reported = (
        exp.Case()
        .when(exp.LT(this=column("u6"), expression=number(0.01)), exp.cast(exp.null(), "DOUBLE"))
        .when(exp.LT(this=column("u6"), expression=number(0.0102)), number(0.0))
        .else_(rounded(column("_revenue"), 2))
    )
    return exp.select(
        column("lease_id"),
        column("firm_age_years"),
        alias(revenue_as_reported, "monthly_revenue"),
        alias(rounded(mul(column("_revenue"), column("_share")), 2), "monthly_payment"),
        column("term_months"),
        column("sector"),
        column("past_late_payments"),
        alias(exp.cast(exp.Case().when(exp.LT(this=column("u10"), expression=chance), integer(1)).else_(integer(0)), "BIGINT"),
              "defaulted_12m"),
    ).from_(raw.subquery("raw"))


# ---------------------------------------------------------------- children: each measures only itself


def peak_rss_mb() -> float:
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kilobytes on Linux


def child_generate(root: Path, rows: int, schema: str | None) -> dict:
    from sqlglot import exp

    from featpipe.api import connect, load_project

    project = load_project(root)
    started = time.perf_counter()
    with connect(project) as engine:
        if schema is not None:  # PostgreSQL: the schema on the DSN's search_path
            engine.execute(exp.Create(this=exp.to_table(schema), kind="SCHEMA", exists=True))
        engine.create_table("leases", leases_query(rows, project.engine.kind))
        count = engine.fetch(exp.select(exp.Count(this=exp.Star())).from_("leases"))[0][0]
    return {"seconds": time.perf_counter() - started, "rows": int(count)}


def child_measure(root: Path) -> dict:
    from featpipe import api
    from featpipe.engines import open_engine
    from featpipe.fitted import scoring

    project = api.load_project(root)
    seconds, peaks = {}, {}
    started = time.perf_counter()
    engine = open_engine(project.engine)  # Spark: starts the session the steps below reuse
    seconds["start"] = time.perf_counter() - started
    try:
        started = time.perf_counter()
        (built,) = api.compute(project, [MODEL])
        seconds["compute"] = time.perf_counter() - started
        peaks["compute"] = peak_rss_mb()
        started = time.perf_counter()
        (outcome,) = api.fit(project, [MODEL])
        seconds["fit"] = time.perf_counter() - started
        peaks["fit"] = peak_rss_mb()
        started = time.perf_counter()
        engine.fetch(scan_query(project))
        seconds["scan"] = time.perf_counter() - started
        started = time.perf_counter()
        scored = scoring.score(project, MODEL, table="leases", into="scores")
        seconds["score"] = time.perf_counter() - started
    finally:
        engine.close()
    fitted = outcome.fitted
    return {
        "seconds": seconds, "peak_rss_mb": peak_rss_mb(), "peaks_mb": peaks, "rows": built.rows, "train": fitted.rows["train"],
        "scored": scored.rows, "iterations": fitted.fit["iterations"], "converged": fitted.fit["converged"],
        # every coefficient: a learned term (the demo's sector_level) has one per design column
        "coef": [item["estimate"] for term in fitted.terms
                 for item in (term.learned["columns"] if term.estimate is None else [{"estimate": term.estimate}])],
    }


def scan_query(project):
    """One aggregate scan of the model's design table: the count, and the sum of every term (the count of
    a learned term's column, which holds its argument, text for LEVELS)."""
    from sqlglot import exp

    from featpipe import api
    from featpipe.sqlgen.common import column, double

    model = api.check(project).models[MODEL]
    sums = [exp.Count(this=column(term.name)) if term.learned else exp.Sum(this=double(column(term.name)))
            for term in model.terms]
    layout = model.layout
    return exp.select(exp.Count(this=exp.Star()), *sums).from_(exp.to_table(layout.table))


def serve_postgres() -> None:
    """Start the throwaway server as the tests do, print its DSN, stop it when stdin closes."""
    sys.path.insert(0, str(REPO / "tests"))
    from fixtures_engines import PostgresServer, postgres_programs

    programs = postgres_programs()
    if programs is None:
        print(json.dumps({"error": "initdb/pg_ctl not found on PATH or in /usr/lib/postgresql/*/bin"}), flush=True)
        return
    server = PostgresServer(*programs)
    try:
        print(json.dumps({"dsn": server.start()}), flush=True)
        sys.stdin.read()
    finally:
        server.stop()


# ---------------------------------------------------------------- the driver (standard library only)


def child(mode: str, *args: str, env: dict[str, str] | None = None) -> dict:
    command = [sys.executable, __file__, "--child", mode, *args]
    done = subprocess.run(command, capture_output=True, text=True, env={**os.environ, **(env or {})}, check=False)
    if done.returncode != 0:
        raise SystemExit(f"{mode} {' '.join(args)} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def project_copy(folder: Path, kind: str) -> Path:
    """The demo project with `kind`'s engine block and no `load:` file (the table is generated in the engine)."""
    root = folder / "lease_default"
    shutil.copytree(DEMO, root, ignore=shutil.ignore_patterns("build", "data", "generate.py"))
    block = {
        "duckdb": "  kind: duckdb\n  path: build/bench.duckdb\n",
        "postgres": f"  kind: postgres\n  dsn: ${{{DSN_VARIABLE}}}\n",
        "spark": "  kind: spark\n  path: build/spark\n",
    }[kind]
    settings = root / "featpipe.yaml"
    text = settings.read_text(encoding="utf-8").replace("  kind: duckdb\n  path: build/lease_default.duckdb\n", block)
    settings.write_text(re.sub(r"\n    load: [^\n]*", "", text), encoding="utf-8")
    return root


def max_relative_difference(values, reference) -> float:
    return max(abs(a - b) / max(abs(b), 1e-300) for a, b in zip(values, reference, strict=True))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, nargs="+", default=[1_000_000], help="row counts of the input table")
    parser.add_argument("--engines", nargs="+", choices=ENGINES, default=list(ENGINES))
    parser.add_argument("--child", choices=["generate", "measure", "postgres"], help=argparse.SUPPRESS)
    parser.add_argument("--project", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--schema", help=argparse.SUPPRESS)
    arguments = parser.parse_args()
    if arguments.child == "postgres":
        serve_postgres()
        return
    if arguments.child == "generate":
        print(json.dumps(child_generate(arguments.project, arguments.rows[0], arguments.schema)))
        return
    if arguments.child == "measure":
        print(json.dumps(child_measure(arguments.project)))
        return

    print(machine_context(PACKAGES), flush=True)
    server = None
    base_dsn = ""
    if "postgres" in arguments.engines:
        server = subprocess.Popen([sys.executable, __file__, "--child", "postgres"], stdin=subprocess.PIPE,
                                  stdout=subprocess.PIPE, text=True)
        answer = json.loads(server.stdout.readline() or '{"error": "the server helper exited"}')
        if "error" in answer:
            raise SystemExit(f"postgres: {answer['error']}")
        base_dsn = answer["dsn"]
    results: dict[tuple[str, int], dict] = {}
    try:
        with tempfile.TemporaryDirectory(prefix="featpipe-bench-") as work:
            print(f"{'engine':<9} {'rows':>11} {'generate s':>11} {'start s':>8} {'compute s':>14} {'fit s':>8} "
                  f"{'score s':>8} {'IRLS':>5} {'peak RSS MB':>12}  {'(after compute, fit)':>24}")
            for rows in arguments.rows:
                for kind in arguments.engines:
                    folder = Path(work) / f"{kind}_{rows}"
                    root = project_copy(folder, kind)
                    env, extra = {}, []
                    if kind == "postgres":
                        schema = f"bench_{rows}"
                        env = {DSN_VARIABLE: f"{base_dsn} options='-c search_path={schema}'"}
                        extra = ["--schema", schema]
                    made = child("generate", "--project", str(root), "--rows", str(rows), *extra, env=env)
                    assert made["rows"] == rows, made
                    result = child("measure", "--project", str(root), env=env)
                    result["generate"] = made["seconds"]
                    results[kind, rows] = result
                    s = result["seconds"]
                    print(f"{kind:<9} {rows:>11,} {made['seconds']:>11.1f} {s['start']:>8.1f} {s['compute']:>14.1f} "
                          f"{s['fit']:>8.1f} {s['score']:>8.1f} {result['iterations']:>5} {result['peak_rss_mb']:>12.0f}  "
                          f"{result['peaks_mb']['compute']:>15.0f}, {result['peaks_mb']['fit']:>6.0f}",
                          flush=True)
                    shutil.rmtree(folder, ignore_errors=True)
    finally:
        if server is not None:
            server.stdin.close()
            server.wait(timeout=120)

    smallest, largest = min(arguments.rows), max(arguments.rows)
    if largest > smallest:
        print(f"\npeak RSS at {largest:,} rows against {smallest:,} rows ({largest / smallest:g}x the rows):")
        for kind in arguments.engines:
            ratio = results[kind, largest]["peak_rss_mb"] / results[kind, smallest]["peak_rss_mb"]
            print(f"  {kind:<9} {ratio:.2f}x")
    print("\nfit against one aggregate scan of the design table (SUM of every term), same child, goal <= 4x:")
    for (kind, rows), result in results.items():
        s = result["seconds"]
        print(f"  {kind:<9} {rows:>11,} rows: fit {s['fit']:.2f} s, scan {s['scan']:.2f} s, fit / scan {s['fit'] / s['scan']:.1f}x")
    if "duckdb" in arguments.engines and len(arguments.engines) > 1:
        print("\nagreement with DuckDB on the same generated rows: training rows, rows scored, "
              "largest relative difference of the coefficients:")
        for rows in arguments.rows:
            reference = results["duckdb", rows]
            others = "; ".join(
                f"{kind} train {results[kind, rows]['train']:,}, scored {results[kind, rows]['scored']:,}, "
                f"coefficients {max_relative_difference(results[kind, rows]['coef'], reference['coef']):.1e}"
                for kind in arguments.engines if kind != "duckdb"
            )
            print(f"  {rows:>11,} rows: duckdb train {reference['train']:,}, scored {reference['scored']:,}; {others}")


if __name__ == "__main__":
    sys.path.insert(0, str(REPO))
    main()
