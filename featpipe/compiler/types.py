"""Infer each term's type from the column contract; a term must be numeric or boolean, arithmetic
reads numbers, and LENGTH, LOWER, UPPER and TRIM read text.

Terms are checked in dependency order, each against a schema holding the input's columns and the
types of the terms it may use, so an error points into the term's own file.

Example:
    >>> import sqlglot
    >>> term_type(sqlglot.parse_one("p / r"), {"p": "DOUBLE", "r": "BIGINT"})
    ('numeric', [])
"""

from __future__ import annotations

from sqlglot import exp
from sqlglot.optimizer.annotate_types import annotate_types
from sqlglot.optimizer.qualify import qualify

from .parse import TERM_DIALECT

ARITHMETIC = (
    exp.Add, exp.Sub, exp.Mul, exp.Div, exp.IntDiv, exp.Mod, exp.Pow, exp.Neg, exp.Abs, exp.Ln,
    exp.Log, exp.Exp, exp.Sqrt, exp.Round, exp.Floor, exp.Ceil, exp.Sign, exp.Least, exp.Greatest,
)
TEXT_FUNCTIONS = (exp.Length, exp.Lower, exp.Upper, exp.Trim)  # engines have them for text only
TERM_TABLE = "term_input"


def _shown(node: exp.Expression) -> str:
    """How a message names an operand: a column by its name as declared, anything else as SQL."""
    return node.name if isinstance(node, exp.Column) else node.sql(dialect=TERM_DIALECT)


def _is_text(data_type: exp.DataType | None) -> bool:
    return data_type is not None and data_type.is_type(*exp.DataType.TEXT_TYPES)


def _is_number(data_type: exp.DataType | None) -> bool:
    return data_type is not None and data_type.is_type(
        *exp.DataType.REAL_TYPES, *exp.DataType.INTEGER_TYPES, exp.DataType.Type.BOOLEAN)


def term_type(expression: exp.Expression, schema: dict[str, str]) -> tuple[str | None, list[tuple[exp.Expression, str]]]:
    """('numeric' | 'boolean' | None, [(offending node, message)]) for one term expression."""
    query = exp.select(exp.alias_(expression.copy(), "value")).from_(TERM_TABLE)
    tables = {TERM_TABLE: schema}
    query = qualify(query, schema=tables, dialect=TERM_DIALECT, validate_qualify_columns=False)
    query = annotate_types(query, schema=tables, dialect=TERM_DIALECT)
    value = query.expressions[0].this
    problems = []
    for node in value.walk():
        if isinstance(node, ARITHMETIC):
            for operand in node.iter_expressions():
                if _is_text(operand.type):
                    original = _original(expression, operand)
                    label = _shown(original)
                    problems.append((original,
                                     f"arithmetic on text: '{label}' is {operand.type.sql()}; "
                                     "compare it to a value (e.g. CASE WHEN x = 'a' THEN 1 ELSE 0 END) or CAST it"))
        if isinstance(node, TEXT_FUNCTIONS) and _is_number(node.this.type):
            original = _original(expression, node.this)
            label = _shown(original if isinstance(original, exp.Column) else node.this)
            message = f"{node.sql_name()} takes text, but '{label}' is {node.this.type.sql()}; use the number itself, or CAST it to VARCHAR"
            problems.append((original, message))
    if problems:
        return None, problems
    result = value.type
    if result is not None and result.is_type(exp.DataType.Type.BOOLEAN):
        return "boolean", []
    if result is not None and result.is_type(*exp.DataType.REAL_TYPES, *exp.DataType.INTEGER_TYPES):
        return "numeric", []
    shown = result.sql() if result is not None else "unknown"
    return None, [(expression, f"a term must be numeric or boolean, but this expression is {shown}; "
                               "turn text into indicators, e.g. CASE WHEN x = 'a' THEN 1 ELSE 0 END")]


def _original(original: exp.Expression, qualified: exp.Expression) -> exp.Expression:
    """The node of the user's tree matching a node of the qualified copy (same column name)."""
    column = qualified if isinstance(qualified, exp.Column) else qualified.find(exp.Column)
    if column is not None:
        for node in original.find_all(exp.Column):
            if node.name == column.name:
                return node
    return original
