"""Check a table in the engine against an input's contract before anything reads it: its declared
columns and types, and its key (unique, never NULL)."""

from __future__ import annotations

from sqlglot import exp

from ..errors import FeatpipeError
from ..project import PROJECT_FILE, InputSpec
from ..sqlgen.keys import KeyCheck, key_check_query
from .base import Engine

T = exp.DataType.Type
FAMILIES = {
    "integer": exp.DataType.INTEGER_TYPES,
    "floating point": exp.DataType.REAL_TYPES - exp.DataType.INTEGER_TYPES,
    "text": exp.DataType.TEXT_TYPES | {T.CHAR, T.NCHAR},
    "boolean": {T.BOOLEAN},
    "date": {T.DATE, T.DATE32},
    "timestamp": exp.DataType.TEMPORAL_TYPES - {T.DATE, T.DATE32},
}


def type_family(data_type: exp.DataType) -> str:
    """A coarse family (integer, floating point, text, ...) that engines agree on."""
    for family, members in FAMILIES.items():
        if data_type.this in members:
            return family
    return data_type.sql()


def contract_problems(
    source: InputSpec, table: str, actual: dict[str, exp.DataType] | None, engine: str, *, subject: str | None = None
) -> list[str]:
    """What differs between the declared columns and the table's real ones (empty when all fit).

    `subject` names what the columns came from in the messages (default: the table; a loaded file
    is checked on its temporary table before it replaces `table`, so the messages name the file).
    """
    if actual is None:
        hint = " (or give 'load:' a file for local work)" if source.load is None else ""
        return [f"{engine}: table '{table}' does not exist; create it{hint}"]
    subject = subject or f"table '{table}'"
    problems = []
    for column, declared in source.columns.items():
        if column not in actual:
            problems.append(f"column '{column}' ({declared}) is missing from {subject}")
            continue
        wanted = type_family(exp.DataType.build(declared, dialect="duckdb"))
        found = type_family(actual[column])
        if wanted != found and not (wanted == "floating point" and found == "integer"):  # widening is safe
            problems.append(f"column '{column}' is declared {declared} ({wanted}) but {subject} has {actual[column].sql()} ({found})")
    return problems


def check_contract(
    source: InputSpec, table: str, actual: dict[str, exp.DataType] | None, engine: str, *, subject: str | None = None
) -> None:
    subject = subject or f"table '{table}'"
    problems = contract_problems(source, table, actual, engine, subject=subject)
    if problems:
        raise FeatpipeError(
            f"{PROJECT_FILE}: {subject} does not match the contract of input '{source.name}':\n  "
            + "\n  ".join(problems)
            + f"\nfix the data or the 'columns:' of input '{source.name}' in {PROJECT_FILE}"
        )


def check_key(engine: Engine, table: str, key: str, subject: str) -> None:
    """Refuse a table whose `key` is NULL on some row or repeats: every output is keyed by it.

    `subject` starts the message: the loaded file, or the engine's table.
    """
    found = KeyCheck.from_row(engine.fetch(key_check_query(table, key))[0])
    problems = []
    if found.null_rows:
        problems.append(f"is NULL on {_count(found.null_rows, 'row')}")
    if found.repeated_keys:
        examples = ", ".join(str(value) for value in found.examples)
        appear = "appears" if found.repeated_keys == 1 else "appear"
        problems.append(f"is not unique: {_count(found.repeated_keys, 'key')} {appear} more than once (e.g. {examples})")
    if problems:
        raise FeatpipeError(
            f"{subject}: key {key} {' and '.join(problems)}; fix the data or declare another key in {PROJECT_FILE}"
        )


def _count(number: int, noun: str) -> str:
    return f"{number:,} {noun}" if number == 1 else f"{number:,} {noun}s"
