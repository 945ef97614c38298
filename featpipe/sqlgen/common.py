"""Small tree builders shared by every generated query: quoted columns, DOUBLE casts, exact literals."""

from __future__ import annotations

import functools
import math

from sqlglot import exp

from ..compiler.layout import DesignLayout
from ..errors import FeatpipeError
from .dates import for_dialect
from .dialects import DIALECTS


def column(name: str, table: str | None = None) -> exp.Column:
    """A quoted column reference (identifiers are always quoted when rendered)."""
    return exp.column(exp.to_identifier(name, quoted=True), table=exp.to_identifier(table, quoted=True) if table else None)


def double(expression: exp.Expression) -> exp.Cast:
    return exp.cast(expression, exp.DataType.build("DOUBLE"))


def number(value: float) -> exp.Expression:
    """`value` as a DOUBLE literal with round-trip precision (repr is the shortest exact form)."""
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"cannot write {value} as a SQL literal")
    text = repr(value)
    literal = exp.Literal.number(text.lstrip("-"))
    return double(exp.Neg(this=literal) if text.startswith("-") else literal)


def alias(expression: exp.Expression, name: str) -> exp.Alias:
    return exp.alias_(expression, exp.to_identifier(name, quoted=True))


def count_if(condition: exp.Expression) -> exp.Sum:
    """Rows where `condition` holds, portably (COUNT_IF and FILTER are not on every engine)."""
    return exp.Sum(this=exp.Case().when(condition, exp.Literal.number(1)).else_(exp.Literal.number(0)))


def null_count(value: exp.Expression) -> exp.Sub:
    """Rows where `value` is NULL, as COUNT(*) - COUNT(value): engines count the non-NULL values from
    their validity masks without evaluating a condition per row (DuckDB, NULLs of 25 columns over 10M
    rows: 0.02 s against 0.65 s for a sum of CASE WHEN ... IS NULL)."""
    return exp.Sub(this=exp.Count(this=exp.Star()), expression=exp.Count(this=value))


def render(statement: exp.Expression, dialect: str, pretty: bool = True) -> str:
    """`statement` as featpipe's engines run it and `featpipe sql` prints it for `dialect`: one renderer
    for both, so an exported query is exactly what the adapter ran (PostgreSQL's planner fences and
    Spark's exact percentiles included); date parts are written as each engine computes them."""
    statement = for_dialect(statement, dialect)
    if dialect == "postgres":
        statement = fenced(statement)
    elif dialect == "sqlite":
        statement = materialized(statement)
    return statement.sql(dialect=_exact_spark() if dialect == "spark" else dialect, identify=True, pretty=pretty)


def fenced(statement: exp.Expression) -> exp.Expression:
    """A copy of `statement` with OFFSET 0 on every derived table and WITH query, so each layer is planned apart.

    PostgreSQL pulls a simple subquery (and a WITH query used once) up into the query around it and
    copies the subquery's expressions into every place its columns are used, without sharing common
    subexpressions. featpipe's layered queries use each layer's columns many times (the X'WX sums read
    every working weight p(p+1)/2 times), so flattened they recompute the same expressions again and
    again: the statistics query of the 11-term demo model took 7.5 s on 3,435 rows flattened (most of
    it JIT-compiling the copies) and 32 ms fenced. OFFSET 0 stops the pull-up and changes no result.
    """
    statement = statement.copy()
    for node in list(statement.find_all(exp.Subquery, exp.CTE)):
        derived = isinstance(node, exp.CTE) or isinstance(node.parent, (exp.From, exp.Join))
        body = node.this
        if derived and isinstance(body, exp.Select) and not body.args.get("limit") and not body.args.get("offset"):
            body.offset(0, copy=False)
    return statement


def materialized(statement: exp.Expression) -> exp.Expression:
    """A copy of `statement` with every WITH query marked MATERIALIZED (SQLite 3.35 and later).

    SQLite flattens a WITH query into the query that reads it and computes its expressions again at
    every use; the scoring query's reason steps use each column of the step before many times, so
    flattened they grow with the product of the steps (125 s for 3 reasons of 20 terms on 400 rows,
    0.7 s materialized). Materializing changes no result.
    """
    statement = statement.copy()
    for node in statement.find_all(exp.CTE):
        node.set("materialized", True)
    return statement


@functools.cache
def _exact_spark():
    """sqlglot's Spark dialect with exact percentiles (built on first use: --help and check never render Spark)."""
    from sqlglot.dialects.spark import Spark
    from sqlglot.generators.spark import SparkGenerator

    class ExactSpark(Spark):
        """Spark SQL in which PERCENTILE_CONT stays exact.

        sqlglot renders PERCENTILE_CONT(q) WITHIN GROUP (ORDER BY x) for Spark as PERCENTILE_APPROX(x, q),
        which is neither exact nor interpolated (Spark 4 gives 1.0 for the 0.25 quantile of 1, 2, 4, 10,
        where PERCENTILE_CONT gives 1.75), so report ranges differed from the other engines. Spark runs
        the standard WITHIN GROUP form itself (since 3.3), exactly.
        """

        class Generator(SparkGenerator):
            TRANSFORMS = {node: render for node, render in SparkGenerator.TRANSFORMS.items() if node is not exp.WithinGroup}

    return ExactSpark


def check_dialect(dialect: str) -> None:
    """Refuse a dialect featpipe does not render for."""
    if dialect not in DIALECTS:
        raise FeatpipeError(f"unknown dialect '{dialect}'; use one of {', '.join(DIALECTS)}")


def complete_rows(layout: DesignLayout) -> exp.Expression:
    """Rows with no NULL in target, offset, weight or any term."""
    return exp.and_(*(column(name).is_(exp.null()).not_() for name in layout.model_columns))


def training_rows(layout: DesignLayout) -> exp.Expression:
    """Rows a fit uses: not held out and complete."""
    return exp.and_(exp.not_(column(layout.holdout)), complete_rows(layout))


def holdout_rows(layout: DesignLayout) -> exp.Expression:
    return exp.and_(column(layout.holdout), complete_rows(layout))
