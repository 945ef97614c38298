"""Candidate terms for `featpipe suggest`: term-file SQL built from a model input's declared columns.

Pure functions over the spec, the input's contract, the model's terms and a few training figures
(`ColumnSummary`, frequent text levels). Each candidate is term-file SQL (DuckDB, as a reviewer would
write it) with a descriptive name, so the same text is tested, shown and written by `--into`.

Kinds, in the order they are generated (a cap keeps the first ones):

- `column`: a numeric input column that is not yet a term of the model;
- `log`: LN of a column whose training values are all positive;
- `square`: the square of a column centred at its training mean;
- `ratio`: a / NULLIF(b, 0), both orders of every pair; `product`: a * b, every pair;
- `threshold`: CASE WHEN a > q THEN 1 ELSE 0 END at the distinct training deciles of a below its maximum;
- `level`: CASE WHEN c = 'v' THEN 1 ELSE 0 END for the frequent levels of text columns;
- `interaction`: a model term times a threshold indicator (an effect that holds only above a threshold);
  never a learned term (LEVELS, BINS, SPLINE, CAPPED): no term may use one, as its constants are
  learned per model, and most have several columns. Its argument's column still enters the `product`,
  `ratio` and `threshold` candidates like any column (a candidate the term already spans is dropped as
  collinear).

The target, the offset's columns, the weights and the key are never used.

    >>> summary = ColumnSummary("age", rows=4, count=4, mean=2.5, min=1.0, max=4.0, deciles=(1.0, 2.0, 3.0, 4.0))
    >>> [c.sql for c in threshold_candidates(summary, taken=set())]
    ['CASE WHEN age > 1 THEN 1 ELSE 0 END', 'CASE WHEN age > 2 THEN 1 ELSE 0 END', 'CASE WHEN age > 3 THEN 1 ELSE 0 END']
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass

import sqlglot
from sqlglot import exp
from sqlglot.errors import ParseError, TokenError

from ..project import InputSpec, ModelSpec
from ..project.names import NAME_PATTERN, reserved_reason
from .parse import TERM_DIALECT

KINDS = ("column", "log", "square", "ratio", "product", "threshold", "level", "interaction")


@dataclass(frozen=True)
class ColumnSummary:
    """A numeric input column on the model's training rows: counts, mean, range, distinct deciles."""

    name: str
    rows: int  # training rows
    count: int  # of them, with a value
    mean: float | None
    min: float | None
    max: float | None
    deciles: tuple[float, ...]  # distinct, ascending


@dataclass(frozen=True)
class Candidate:
    name: str  # a term name no term or column of the project has
    kind: str  # one of KINDS
    sql: str  # term-file SQL; for kind "column", the column itself
    description: str  # "ratio of a to b", for the plain-language line


@dataclass(frozen=True)
class ModelTermInfo:
    """What an interaction needs of a model term: its name, whether it is boolean, and whether it is a
    learned term (which forms none)."""

    name: str
    boolean: bool
    learned: bool


def numeric_columns(spec: ModelSpec, source: InputSpec, offset_columns: set[str]) -> list[str]:
    """Declared numeric columns a candidate may read: not the key, target, weights or the offset's columns."""
    return [name for name, kind in source.columns.items()
            if name not in _excluded(spec, source, offset_columns) and _is_type(kind, *exp.DataType.REAL_TYPES, *exp.DataType.INTEGER_TYPES)]


def text_columns(spec: ModelSpec, source: InputSpec, offset_columns: set[str]) -> list[str]:
    """Declared text columns whose frequent levels become indicators."""
    return [name for name, kind in source.columns.items()
            if name not in _excluded(spec, source, offset_columns) and _is_type(kind, *exp.DataType.TEXT_TYPES)]


def _excluded(spec: ModelSpec, source: InputSpec, offset_columns: set[str]) -> set[str]:
    return {source.key, spec.target, *([spec.weights] if spec.weights else []), *offset_columns}


def _is_type(declared: str, *types) -> bool:
    return exp.DataType.build(declared, dialect=TERM_DIALECT).is_type(*types)


def generate_candidates(
    model_terms: list[ModelTermInfo],
    summaries: list[ColumnSummary],
    levels: dict[str, list[str]],
    taken: set[str],
) -> list[Candidate]:
    """Every candidate, kinds in the order of KINDS; `taken` holds the names in use (any case) and
    grows with each name given. Columns without a value on the training rows give none."""
    taken = set(taken)
    present = {term.name for term in model_terms}
    usable = [s for s in summaries if s.count > 0]
    found: list[Candidate] = []
    found += [Candidate(s.name, "column", identifier(s.name), f"input column {s.name}") for s in usable if s.name not in present]
    for s in usable:
        if s.min is not None and s.min > 0:
            found.append(_named(f"ln_{s.name}", taken, "log", f"LN({identifier(s.name)})", f"logarithm of {s.name}"))
    for s in usable:
        if s.min != s.max:
            centred = f"({identifier(s.name)} {_minus(s.mean)})"
            found.append(_named(f"{s.name}_squared", taken, "square", f"{centred} * {centred}",
                                f"square of {s.name} centred at its training mean {literal(s.mean)}"))
    for a in usable:
        for b in usable:
            if a is not b:
                found.append(_named(f"{a.name}_to_{b.name}", taken, "ratio",
                                    f"{identifier(a.name)} / NULLIF({identifier(b.name)}, 0)", f"ratio of {a.name} to {b.name}"))
    for i, a in enumerate(usable):
        for b in usable[i + 1:]:
            found.append(_named(f"{a.name}_times_{b.name}", taken, "product",
                                f"{identifier(a.name)} * {identifier(b.name)}", f"product of {a.name} and {b.name}"))
    thresholds = [candidate for s in usable for candidate in threshold_candidates(s, taken)]
    found += thresholds
    for column, values in levels.items():
        for value in values:
            found.append(_named(f"{column}_is_{_name_part(value)}", taken, "level",
                                f"CASE WHEN {identifier(column)} = {_string(value)} THEN 1 ELSE 0 END",
                                f"indicator of {column} = '{value}'"))
    for term in (term for term in model_terms if not term.learned):
        for threshold in thresholds:
            condition = threshold.sql.removeprefix("CASE WHEN ").removesuffix(" THEN 1 ELSE 0 END")
            above = threshold.description.removeprefix("indicator of ")
            sql = (f"CASE WHEN {identifier(term.name)} AND {condition} THEN 1 ELSE 0 END" if term.boolean
                   else f"{identifier(term.name)} * {threshold.sql}")
            found.append(_named(f"{term.name}_when_{threshold.name}", taken, "interaction", sql,
                                f"{term.name} where {above}"))
    return found


def threshold_candidates(summary: ColumnSummary, taken: set[str]) -> list[Candidate]:
    """Indicators of `a > q` at the distinct training deciles q below the maximum (the literal as written
    decides the indicator, so deciles that print alike give one candidate)."""
    found, written = [], set()
    for q in summary.deciles:
        text = literal(q)
        if summary.max is None or q >= summary.max or text in written:
            continue
        written.add(text)
        found.append(_named(f"{summary.name}_above_{_name_part(text)}", taken, "threshold",
                            f"CASE WHEN {identifier(summary.name)} > {text} THEN 1 ELSE 0 END",
                            f"indicator of {summary.name} above {text}"))
    return found


def literal(value: float) -> str:
    """A number as term SQL writes it: 6 significant digits, no exponent for everyday sizes."""
    text = f"{value:.6g}"
    return "0" if text == "-0" else text


def _minus(value: float) -> str:
    text = literal(value)
    return f"+ {text[1:]}" if text.startswith("-") else f"- {text}"


def _string(value: str) -> str:
    return exp.Literal.string(value).sql(dialect=TERM_DIALECT)


def _name_part(text: str) -> str:
    """Text turned into a piece of a term name: '2.5' -> '2p5', '-1' -> 'minus1', 'food service' -> 'food_service'."""
    text = text.replace("-", "minus").replace(".", "p").replace("+", "")
    return re.sub(r"_+", "_", re.sub(r"[^A-Za-z0-9]", "_", text)).strip("_") or "blank"


def _named(wanted: str, taken: set[str], kind: str, sql: str, description: str) -> Candidate:
    """A candidate under `wanted`, or wanted_2, wanted_3, ... when that name is in use or not allowed."""
    if not NAME_PATTERN.match(wanted) or reserved_reason(wanted):
        wanted = f"candidate_{kind}"
    name, number = wanted, 1
    while name.lower() in taken or reserved_reason(name):
        number += 1
        name = f"{wanted}_{number}"
    taken.add(name.lower())
    return Candidate(name, kind, sql, description)


@functools.cache
def identifier(name: str) -> str:
    """A column or term name as term SQL writes it: bare when DuckDB reads it back as that name, else quoted."""
    if re.fullmatch(r"[a-z_][a-z0-9_]*", name):
        try:
            parsed = sqlglot.parse_one(f"SELECT {name} FROM t", read=TERM_DIALECT)
            projection = parsed.expressions[0] if isinstance(parsed, exp.Select) else None
            if isinstance(projection, exp.Column) and projection.name == name and not projection.table:
                return name
        except (ParseError, TokenError):
            pass
    return exp.to_identifier(name, quoted=True).sql(dialect=TERM_DIALECT)


def term_file_text(input_name: str, header: list[str], terms: list[tuple[list[str], Candidate]]) -> str:
    """A term file over `input_name`: header comment lines, then each candidate with its comment lines
    above it (its doc once the file is part of the project)."""
    lines = [f"-- {_one_line(line)}" for line in header] + ["SELECT"]
    for index, (comments, candidate) in enumerate(terms):
        lines += [f"  -- {_one_line(line)}" for line in comments]
        lines.append(f"  {candidate.sql} AS {candidate.name}{',' if index < len(terms) - 1 else ''}")
    lines.append(f"FROM {identifier(input_name)}")
    return "\n".join(lines) + "\n"


def _one_line(text: str) -> str:
    """A comment line never holds a line break (a text level may): the rest would be read as SQL."""
    return " ".join(text.split())
