"""The terms and design-table queries of a model, as sqlglot trees.

The design table holds the key, the target as DOUBLE, the offset, weight and cluster column when the
model has them, the holdout flag and one DOUBLE column per term, every term computed from input columns only
(references inlined) with the portable-SQL hardening applied.
"""

from __future__ import annotations

from sqlglot import exp

from ..compiler import CompiledModel, Term
from ..project import Holdout, InputSpec
from ..project.names import table_reference
from .common import alias, column, double, number
from .harden import as_number, harden

HASH_DIGITS = 8  # hex digits of MD5 used for the split: 16**8 buckets


def holdout_threshold(fraction: float) -> str:
    """The hex prefix below which a row is held out: a share `fraction` of all MD5 values."""
    return format(int(round(fraction * 16**HASH_DIGITS)), f"0{HASH_DIGITS}x")


def hash_digits(key: str, salt: str) -> exp.Expression:
    """The first hex digits of MD5(salt ':' key): a row's place in a split, the same on every engine.

    Every engine computes MD5 of the same text identically and compares lowercase hex strings of
    equal length the same way, so a split by comparing these digits is the same everywhere.
    """
    keyed = exp.DPipe(this=exp.Literal.string(f"{salt}:"), expression=exp.cast(column(key), "VARCHAR"), safe=True)
    return exp.Substring(this=exp.MD5(this=keyed), start=exp.Literal.number(1), length=exp.Literal.number(HASH_DIGITS))


def holdout_flag(key: str, holdout: Holdout) -> exp.Expression:
    """TRUE for held-out rows: hash digits below the fraction's threshold or, out of time, the period
    column on or after `holdout.start`. A row without a period value is held out too: it cannot be
    placed in time, so it is never trained on."""
    if holdout.out_of_time:
        if isinstance(holdout.start, str):
            start = exp.cast(exp.Literal.string(holdout.start), exp.DataType.build("DATE"))
            period = column(holdout.column)
        else:
            start, period = number(holdout.start), double(column(holdout.column))
        return exp.Coalesce(this=exp.GTE(this=period, expression=start), expressions=[exp.true()])
    threshold = holdout_threshold(holdout.fraction)
    if threshold == "0" * HASH_DIGITS:  # no digits fall below it: FALSE, without an MD5 per row
        return exp.false()
    return exp.LT(this=hash_digits(key, holdout.salt), expression=exp.Literal.string(threshold))


def term_value(term: Term, source: InputSpec) -> exp.Expression:
    """A term's value as DOUBLE from its inlined expression; booleans become 1.0/0.0, NULL stays NULL.

    A learned term's value is its argument's (sqlgen/learned.py expands it into columns): for LEVELS
    the level as text, whole numbers written without a fraction on every engine."""
    return learned_value(term.kind, harden(term.inlined, schema=source.columns)) if term.learned else \
        as_number(harden(term.inlined, schema=source.columns), term.kind == "boolean")


def learned_value(kind: str, hardened: exp.Expression) -> exp.Expression:
    """A learned term's hardened argument as stored: VARCHAR for a LEVELS term ('text', or a whole number
    through BIGINT), DOUBLE otherwise."""
    if kind == "text":
        return exp.cast(hardened, exp.DataType.build("VARCHAR"))
    if kind == "whole":
        return exp.cast(exp.cast(hardened, exp.DataType.build("BIGINT")), exp.DataType.build("VARCHAR"))
    return as_number(hardened, False)


def target_value(name: str, declared_type: str) -> exp.Expression:
    declared = exp.DataType.build(declared_type, dialect="duckdb")
    return as_number(column(name), declared.is_type(exp.DataType.Type.BOOLEAN))


def _source_table(source: InputSpec, table: str | None) -> exp.Table:
    """The table a query reads: `table` (given as --table) or else the input's own name."""
    return table_reference(table, "--table") if table else table_reference(source.name, f"input {source.name!r}")


def terms_query(terms: list[Term], source: InputSpec, table: str | None = None) -> exp.Select:
    """Key and every term value of one input."""
    projections = [alias(column(source.key), source.key)]
    projections += [alias(term_value(term, source), term.name) for term in terms]
    return exp.select(*projections).from_(_source_table(source, table))


def design_query(model: CompiledModel, source: InputSpec, table: str | None = None) -> exp.Select:
    """The query that builds `design_<model>` from the input table."""
    spec, layout = model.spec, model.layout
    target = target_value(spec.target, source.columns[spec.target])
    if spec.trials:  # the share of successes, with the trials as the weight
        target = exp.Div(this=target, expression=exp.Nullif(this=double(column(spec.trials)), expression=number(0.0)))
    projections = [
        alias(column(source.key), source.key),
        alias(target, layout.target),
    ]
    if model.offset is not None:
        projections.append(alias(as_number(harden(model.offset, schema=source.columns), False), layout.offset))
    if spec.weights or spec.trials:
        projections.append(alias(double(column(spec.weights or spec.trials)), layout.weight))
    if layout.cluster:
        projections.append(alias(column(spec.cluster), layout.cluster))
    projections.append(alias(holdout_flag(source.key, spec.holdout), layout.holdout))
    projections += [alias(term_value(term, source), term.name) for term in model.terms]
    return exp.select(*projections).from_(_source_table(source, table))
