"""Check a table in the engine against an input's column contract before anything reads it."""

from __future__ import annotations

from sqlglot import exp

from ..errors import FeatpipeError
from ..project import PROJECT_FILE, InputSpec

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


def contract_problems(source: InputSpec, table: str, actual: dict[str, exp.DataType] | None, engine: str) -> list[str]:
    """What differs between the declared columns and the table's real ones (empty when all fit)."""
    if actual is None:
        hint = " (or give 'load:' a file for local work)" if source.load is None else ""
        return [f"{engine}: table '{table}' does not exist; create it{hint}"]
    problems = []
    for column, declared in source.columns.items():
        if column not in actual:
            problems.append(f"column '{column}' ({declared}) is missing from table '{table}'")
            continue
        wanted = type_family(exp.DataType.build(declared, dialect="duckdb"))
        found = type_family(actual[column])
        if wanted != found and not (wanted == "floating point" and found == "integer"):  # widening is safe
            problems.append(f"column '{column}' is declared {declared} ({wanted}) but table '{table}' has {actual[column].sql()} ({found})")
    return problems


def check_contract(source: InputSpec, table: str, actual: dict[str, exp.DataType] | None, engine: str) -> None:
    problems = contract_problems(source, table, actual, engine)
    if problems:
        raise FeatpipeError(
            f"{PROJECT_FILE}: table '{table}' does not match the contract of input '{source.name}':\n  "
            + "\n  ".join(problems)
            + f"\nfix the data or the 'columns:' of input '{source.name}' in {PROJECT_FILE}"
        )
