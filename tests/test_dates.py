"""Date functions in terms, and the type rules `check` enforces so nothing it passes fails at `compute`.

The values are checked against Python's datetime (`date - date` in days, `.year`, `.month`, `.day`,
`.isoweekday()`) on every engine: DuckDB, PostgreSQL, Spark and SQLite (tests/sqlite_engine.py), over
dates chosen for the edges: leap days (2024 and 2000 are leap years, 1900 is not), year ends, a
Sunday and a Monday, dates before 1970, and NULL dates.
"""

from __future__ import annotations

import datetime

import pytest
import sqlglot
from sqlglot import exp

from conftest import run_featpipe, write_project
from featpipe.compiler import compile_project
from featpipe.engines.duckdb import DuckDBEngine
from featpipe.errors import EngineError, FeatpipeError
from featpipe.project import load_project
from featpipe.sqlgen.common import column
from featpipe.sqlgen.design import terms_query
from featpipe.sqlgen.harden import harden
from sqlite_engine import SQLiteEngine

PROJECT_YAML = """\
name: lapses
engine:
  kind: duckdb
  path: build/lapses.duckdb
inputs:
  policies:
    key: policy_id
    load: data/policies.csv
    columns:
      policy_id: BIGINT
      opened: DATE
      closed: DATE
      stamped: TIMESTAMP
      premium: DOUBLE
      region: VARCHAR
      lapsed: BIGINT
      renewed: BOOLEAN
"""

# (opened, closed): leap days, year ends, a Sunday and a Monday, before 1970, NULLs, closed before opened.
DATES = [
    ("2024-02-28", "2024-03-01"),  # across 2024-02-29
    ("2023-02-28", "2023-03-01"),  # no leap day in 2023
    ("1900-02-28", "1900-03-01"),  # 1900 is not a leap year (a century not divisible by 400)
    ("2000-02-28", "2000-03-01"),  # 2000 is
    ("2023-12-31", "2024-01-01"),  # a year end
    ("2024-03-03", "2024-03-04"),  # a Sunday, then a Monday
    ("2024-02-29", "2024-12-31"),  # the leap day itself; a Tuesday at the year's end
    ("1969-12-31", "1970-01-01"),  # before and at the Unix epoch
    ("2024-03-04", "2024-03-03"),  # closed before opened: a negative count
    (None, "2024-06-15"),  # a NULL date
    ("2024-06-15", None),
    (None, None),
]
ROWS = "\n".join(
    f"{key},{opened or ''},{closed or ''},2024-01-01 10:00:00,{10 + key},north,{key % 2},true"
    for key, (opened, closed) in enumerate(DATES, start=1))
POLICIES_CSV = "policy_id,opened,closed,stamped,premium,region,lapsed,renewed\n" + ROWS + "\n"

TERMS_SQL = """\
SELECT
  DATE_DIFF('day', opened, closed) AS days_open,
  DATEDIFF('day', opened, DATE '2024-02-29') AS days_to_leap_day,
  YEAR(closed) AS closed_year,
  MONTH(closed) AS closed_month,
  DAY(closed) AS closed_day,
  ISODOW(closed) AS closed_weekday,
  EXTRACT(YEAR FROM opened) AS opened_year,
  EXTRACT(MONTH FROM opened) AS opened_month,
  EXTRACT(DAY FROM opened) AS opened_day,
  EXTRACT(ISODOW FROM opened) AS opened_weekday,
  ISODOW(closed) >= 6 AS closed_at_weekend,
  closed >= DATE '2024-01-01' AS closed_since_2024,
  DATE_DIFF('day', COALESCE(opened, DATE '2000-01-01'), closed) / 7 AS weeks_open
FROM policies
"""

MODEL_YAML = """\
input: policies
target: lapsed
family: binomial
terms: [days_open, closed_weekday]
max_dropped: 0.5
penalty: {l2: 1.0}  # 9 rows: keep the fit finite
"""


def dates_project(root, terms: str = TERMS_SQL):
    """A project over the dates above; the model (of two date terms) only with the terms above."""
    return write_project(root, {
        "featpipe.yaml": PROJECT_YAML, "data/policies.csv": POLICIES_CSV, "data/orders.csv": None,
        "terms/basket.sql": None, "terms/dates.sql": terms, "specs/returns.yaml": None,
        "specs/lapse.yaml": MODEL_YAML if terms == TERMS_SQL else None,
    })


def _day(text: str | None) -> datetime.date | None:
    return datetime.date.fromisoformat(text) if text else None


def expected_values() -> dict[str, list]:
    """Each term's value per row, computed by Python's datetime (None where a date it reads is NULL)."""
    leap_day = datetime.date(2024, 2, 29)
    values: dict[str, list] = {name: [] for name in (
        "days_open", "days_to_leap_day", "closed_year", "closed_month", "closed_day", "closed_weekday", "opened_year",
        "opened_month", "opened_day", "opened_weekday", "closed_at_weekend", "closed_since_2024", "weeks_open")}
    for opened, closed in ((_day(a), _day(b)) for a, b in DATES):
        def part(day, name):
            return None if day is None else float(getattr(day, name)() if name == "isoweekday" else getattr(day, name))
        values["days_open"].append(None if None in (opened, closed) else float((closed - opened).days))
        values["days_to_leap_day"].append(None if opened is None else float((leap_day - opened).days))
        for prefix, day in (("closed", closed), ("opened", opened)):
            values[f"{prefix}_year"].append(part(day, "year"))
            values[f"{prefix}_month"].append(part(day, "month"))
            values[f"{prefix}_day"].append(part(day, "day"))
            values[f"{prefix}_weekday"].append(part(day, "isoweekday"))
        values["closed_at_weekend"].append(None if closed is None else float(closed.isoweekday() >= 6))
        values["closed_since_2024"].append(None if closed is None else float(closed >= datetime.date(2024, 1, 1)))
        start = opened or datetime.date(2000, 1, 1)
        values["weeks_open"].append(None if closed is None else (closed - start).days / 7)
    return values


def test_python_datetime_agrees_with_the_calendar_facts_the_rows_were_chosen_for():
    """The reference itself: 2024-03-03 is a Sunday and 2024-03-04 a Monday (ISO 7 and 1); 1900 has no
    February 29th, 2000 and 2024 have one (Gregorian rule, recalled from memory)."""
    assert datetime.date(2024, 3, 3).isoweekday() == 7 and datetime.date(2024, 3, 4).isoweekday() == 1
    assert (datetime.date(1900, 3, 1) - datetime.date(1900, 2, 28)).days == 1
    assert (datetime.date(2000, 3, 1) - datetime.date(2000, 2, 28)).days == 2
    assert (datetime.date(2024, 3, 1) - datetime.date(2024, 2, 28)).days == 2


def values_on(engine, root) -> dict[str, list]:
    """Every term of the project computed on `engine` from the loaded CSV, by row in key order."""
    project = load_project(root)
    compiled = compile_project(project)
    source = project.inputs["policies"]
    engine.load_file("policies", source.load)
    terms = list(compiled.terms.values())
    rows = engine.fetch(terms_query(terms, source).order_by(column(source.key)))
    return {term.name: [None if row[index + 1] is None else float(row[index + 1]) for row in rows]
            for index, term in enumerate(terms)}


def assert_matches_datetime(found: dict[str, list]) -> None:
    expected = expected_values()
    assert set(found) == set(expected)
    different = {name: (found[name], expected[name]) for name in expected if found[name] != expected[name]}
    assert not different, f"(engine, python datetime) per term: {different}"


def test_duckdb_computes_the_date_functions_as_python_datetime(tmp_path):
    engine = DuckDBEngine()
    try:
        assert_matches_datetime(values_on(engine, dates_project(tmp_path)))
    finally:
        engine.close()


def test_sqlite_computes_the_date_functions_as_python_datetime(tmp_path):
    """SQLite has no EXTRACT, YEAR or ISODOW: featpipe writes STRFTIME for it (sqlgen/dates.py)."""
    engine = SQLiteEngine()
    try:
        assert_matches_datetime(values_on(engine, dates_project(tmp_path)))
    finally:
        engine.close()


def test_postgres_computes_the_date_functions_as_python_datetime(tmp_path, postgres_engine):
    assert_matches_datetime(values_on(postgres_engine, dates_project(tmp_path)))


@pytest.mark.spark
def test_spark_computes_the_date_functions_as_python_datetime(tmp_path, spark_engine):
    """Spark's DAYOFWEEK counts from Sunday = 1; ISODOW is written as WEEKDAY(d) + 1 for it."""
    assert_matches_datetime(values_on(spark_engine, dates_project(tmp_path)))


def test_extract_and_the_part_function_are_one_term(tmp_path):
    """EXTRACT(YEAR FROM d) and YEAR(d) mean the same: one canonical SQL, one fingerprint."""
    compiled = compile_project(load_project(dates_project(tmp_path, (
        "SELECT\n  EXTRACT(year FROM closed) AS a,\n  YEAR(closed) AS b,\n  extract(isodow from closed) AS c,\n"
        "  ISODOW(closed) AS d\nFROM policies\n"))))
    terms = compiled.terms
    assert terms["a"].sql == terms["b"].sql == 'YEAR("closed")'
    assert terms["c"].sql == terms["d"].sql == 'ISODOW("closed")'
    assert terms["a"].fingerprint == terms["b"].fingerprint and terms["c"].fingerprint == terms["d"].fingerprint


def test_a_model_with_date_terms_fits_and_scores(tmp_path):
    """End to end on DuckDB: the fitted file keeps the date terms' SQL, reads back valid, and scoring runs it."""
    root = dates_project(tmp_path)
    fitted = run_featpipe("fit", "-p", str(root))
    assert fitted.returncode == 0, fitted.stderr
    text = (root / "fitted" / "lapse.yaml").read_text(encoding="utf-8")
    assert "DATE_DIFF('DAY', \"opened\", \"closed\")" in text and 'ISODOW("closed")' in text
    scored = run_featpipe("score", "lapse", "-p", str(root), "--table", "policies", "--into", "scored")
    assert scored.returncode == 0, scored.stderr


@pytest.mark.parametrize("dialect, expected", [
    # Each engine's own spelling (measured by the value tests above; SQL-NOTES.md "Dates").
    ("postgres", 'EXTRACT(ISODOW FROM "closed")'),
    ("spark", "WEEKDAY(`closed`) + 1"),
    ("sqlite", "(CAST(STRFTIME('%w', \"closed\") AS INTEGER) + 6) % 7 + 1"),
    ("duckdb", 'ISODOW("closed")'),
])
def test_exported_sql_writes_the_weekday_for_each_engine(tmp_path, dialect, expected):
    root = dates_project(tmp_path)
    printed = run_featpipe("sql", "lapse", "-p", str(root), "--dialect", dialect)
    assert printed.returncode == 0, printed.stderr
    assert "".join(expected.split()) in "".join(printed.stdout.split())  # printed over several lines


CLOCK = "{} depends on when it runs: training and scoring would differ; store the date or time as an input column"


@pytest.mark.parametrize("term, message", [
    # a bare CURRENT_DATE carries no position: the enclosing expression's is used
    ("DATE_DIFF('day', opened, CURRENT_DATE)", "3:3: " + CLOCK.format("CURRENT_DATE")),
    ("DATE_DIFF('day', opened, today())", "3:28: " + CLOCK.format("CURRENT_DATE")),
    ("YEAR(NOW())", "3:8: " + CLOCK.format("NOW()")),
    ("DATE_DIFF('day', current_timestamp, closed)", "3:3: " + CLOCK.format("CURRENT_TIMESTAMP")),
], ids=["CURRENT_DATE", "today()", "NOW()", "current_timestamp"])
def test_the_clock_is_refused_as_today(tmp_path, term, message):
    assert refusals(tmp_path, term) == [f"terms/dates.sql:{message}"]


def refusals(tmp_path, term: str) -> list[str]:
    """`featpipe check`'s messages for one term written on line 3 from column 3."""
    root = dates_project(tmp_path, f"SELECT\n  premium AS fine,\n  {term} AS probe\nFROM policies\n")
    with pytest.raises(FeatpipeError) as caught:
        compile_project(load_project(root))
    return [str(d) for d in caught.value.diagnostics]


DATE_ADVICE = "use DATE_DIFF('day', start, end) for a number of days, or YEAR, MONTH, DAY, ISODOW for its parts"
DIFFERENTLY = "which engines refuse or answer differently"
KINDS = "which engines refuse or convert differently; give every value one kind: numbers throughout (for a condition c, " \
        "CASE WHEN c THEN 1 ELSE 0 END) or conditions throughout"

# (term on line 3 from column 3, the exact message, what the engines do with it as written: the reason check refuses it)
REFUSED = {
    "date - date": (
        "closed - opened",
        "3:3: closed - opened subtracts dates, which engines answer differently (a number of days, an INTERVAL, or an "
        "error); write DATE_DIFF('day', opened, closed) for the days from opened to closed"),
    # DuckDB 2.0 refuses it when run: a DATE minus a DATE is a BIGINT there, an INTERVAL in Spark (measured here).
    "CAST(d1 - d2 AS DOUBLE)": (
        "CAST(closed - opened AS DOUBLE)",
        "3:8: closed - opened subtracts dates, which engines answer differently (a number of days, an INTERVAL, or an "
        "error); write DATE_DIFF('day', opened, closed) for the days from opened to closed"),
    "date + number": (
        "closed + 30",
        f"3:3: arithmetic on the date 'closed': engines add, subtract and convert dates differently; {DATE_ADVICE}"),
    "CAST of a date": (
        "CAST(closed AS DOUBLE)",
        f"3:8: CAST of the date 'closed' to DOUBLE: engines turn dates into numbers or text differently, or refuse; {DATE_ADVICE}"),
    "date compared with a number": (
        "closed > 2024",
        f"3:12: compares the date 'closed' with the number 2024, {DIFFERENTLY}; compare a date with a date "
        "(d >= DATE '2024-01-01') or a part of it with a number (YEAR(d) >= 2024)"),
    "date compared with text": (
        "closed >= '2024-01-01'",
        f"3:13: compares the date 'closed' with the text '2024-01-01', {DIFFERENTLY}; write the date as a literal, "
        "DATE '2024-01-01'"),
    "text in arithmetic": (
        "premium + region",
        "3:13: arithmetic on text: 'region' is TEXT; compare it to a value (e.g. CASE WHEN x = 'a' THEN 1 ELSE 0 END) "
        "or CAST it"),
    "text compared with a number": (
        "region = 1",
        f"3:12: compares the text 'region' with the number 1, {DIFFERENTLY}; compare numbers with numbers "
        "(x = 5, not x = '5'), or CAST the text to DOUBLE"),
    "boolean compared with a number": (
        "renewed = 1",
        f"3:13: compares the condition 'renewed' with the number 1, {DIFFERENTLY}; use the condition itself: "
        "c for c = 1 or c = TRUE, NOT c for c = 0"),
    "a number as a condition": (
        "CASE WHEN premium THEN 1 ELSE 0 END",
        "3:13: the number 'premium' stands where a condition is needed, which PostgreSQL and Spark refuse; "
        "write a comparison, e.g. premium <> 0"),
    "CASE of a number and a condition": (
        "CASE WHEN premium > 10 THEN 1 ELSE renewed END",
        f"3:38: CASE gives the number 1 and the condition 'renewed', {KINDS}"),
    "COALESCE of a condition and a number": (
        "COALESCE(renewed, 0)",
        f"3:21: COALESCE gives the condition 'renewed' and the number 0, {KINDS}"),
    "DATE_DIFF of a timestamp": (
        "DATE_DIFF('day', stamped, closed)",
        "3:20: DATE_DIFF reads a date, but the timestamp 'stamped' is not one; give it a column declared DATE in "
        "featpipe.yaml or a literal DATE 'YYYY-MM-DD'"),
    "YEAR of text": (
        "YEAR(region)",
        "3:8: YEAR reads a date, but the text 'region' is not one; give it a column declared DATE in featpipe.yaml "
        "or a literal DATE 'YYYY-MM-DD'"),
    "LENGTH of a date": (
        "LENGTH(closed)",
        f"3:10: LENGTH takes text, but the date 'closed' is not text; {DATE_ADVICE}"),
    "a date-valued term": (
        "COALESCE(closed, opened)",
        f"3:3: a term must be numeric or boolean, but this expression is DATE; {DATE_ADVICE}"),
    "months between dates": (
        "DATE_DIFF('month', opened, closed)",
        "3:3: DATE_DIFF counts only days here: engines count months and years between two dates differently; "
        "write DATE_DIFF('day', start, end), or compare YEAR(d) and MONTH(d)"),
    "DAYOFWEEK": (
        "DAYOFWEEK(closed)",
        "3:3: DAYOFWEEK(d) numbers weekdays differently by engine (Sunday is 0 on some, 1 on others); write ISODOW(d): "
        "Monday = 1 .. Sunday = 7"),
    # EXTRACT's keyword carries no position: the date's is used
    "EXTRACT(DOW)": (
        "EXTRACT(DOW FROM closed)",
        "3:20: EXTRACT(DOW FROM d) numbers weekdays differently by engine (Sunday is 0 on some, 1 on others); "
        "write ISODOW(d): Monday = 1 .. Sunday = 7"),
    "EXTRACT(WEEK)": (
        "EXTRACT(WEEK FROM closed)",
        "3:21: EXTRACT(WEEK FROM ...) is not allowed: featpipe reads only YEAR, MONTH, DAY and ISODOW of a date alike "
        "on every engine"),
    "no such day": (
        "closed >= DATE '2023-02-29'",
        "3:18: DATE '2023-02-29' is not a date; write a date literal as DATE 'YYYY-MM-DD', e.g. DATE '2024-02-29'"),
    "CAST of text to DATE": (
        "YEAR(CAST(region AS DATE))",
        "3:13: CAST to DATE is allowed only for a literal, DATE 'YYYY-MM-DD' (engines read other text as dates "
        "differently); declare a date column as DATE in featpipe.yaml"),
}


@pytest.mark.parametrize("case", list(REFUSED))
def test_a_type_error_is_refused_by_check_saying_what_to_write(tmp_path, case):
    term, message = REFUSED[case]
    assert refusals(tmp_path, term) == [f"terms/dates.sql:{message}"]


ENGINE_TABLE = exp.select(*(exp.alias_(exp.cast(exp.Literal.string(value), kind), name) for name, kind, value in (
    ("opened", "DATE", "2024-01-01"), ("closed", "DATE", "2024-03-01"), ("premium", "DOUBLE", "12.5"),
    ("region", "VARCHAR", "north"), ("renewed", "BOOLEAN", "true"))))


@pytest.mark.parametrize("term", [
    "closed - opened", "closed > 2024", "region = 1", "renewed = 1", "CASE WHEN premium THEN 1 ELSE 0 END",
    "CASE WHEN premium > 10 THEN 1 ELSE renewed END", "COALESCE(renewed, 0)", "closed + 30 > closed",
])
def test_postgres_refuses_what_check_refuses(postgres_engine, term):
    """Why check refuses these: PostgreSQL raises a type error for each as written (a real engine, not a
    rule of ours; `closed - opened` is an integer there, but the hardened term casts both dates to DOUBLE)."""
    postgres_engine.create_table("policies", ENGINE_TABLE)
    hardened = harden(sqlglot.parse_one(term, dialect="duckdb"), {"opened": "DATE", "closed": "DATE", "premium": "DOUBLE",
                                                                 "region": "VARCHAR", "renewed": "BOOLEAN"})
    with pytest.raises(EngineError):
        postgres_engine.fetch(exp.select(hardened).from_("policies"))


def test_duckdb_refuses_the_cast_of_a_date_difference_as_compute_ran_it():
    """The issue's case: CAST(d1 - d2 AS DOUBLE) passed check, then DuckDB refused the hardened term
    (each operand cast to DOUBLE: "Conversion Error" / no DATE to DOUBLE cast, DuckDB 2.0)."""
    engine = DuckDBEngine()
    try:
        engine.create_table("policies", ENGINE_TABLE)
        hardened = harden(sqlglot.parse_one("CAST(closed - opened AS DOUBLE)", dialect="duckdb"), {"opened": "DATE", "closed": "DATE"})
        with pytest.raises(EngineError):
            engine.fetch(exp.select(hardened).from_("policies"))
    finally:
        engine.close()
