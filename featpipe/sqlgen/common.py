"""Small tree builders shared by every generated query: quoted columns, DOUBLE casts, exact literals."""

from __future__ import annotations

import math

from sqlglot import exp

from ..compiler.layout import DesignLayout
from ..errors import FeatpipeError
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


def render(statement: exp.Expression, dialect: str, pretty: bool = True) -> str:
    return statement.sql(dialect=dialect, identify=True, pretty=pretty)


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
