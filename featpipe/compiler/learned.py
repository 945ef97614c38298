"""Learned terms: a projection that is one call of LEVELS, BINS, SPLINE or CAPPED.

Their constants (levels, edges, knots, caps) are learned from each model's training rows at fit time,
so the compiler only recognises the call, checks its arguments and hands the other passes the
argument expression: resolve, allow-list, types and inlining then check it like any term. The term's
fingerprint covers the whole call, so changing k or min_rows changes its meaning.

- `LEVELS(expr, min_rows)`: text or integer expr; min_rows a whole number of at least 1.
- `BINS(expr, k)`: numeric expr; k a whole number from 2 to MAX_BINS.
- `SPLINE(expr, k)`: numeric expr; k knots, 3 to 7 (Harrell's knot quantiles, `SPLINE_KNOTS`).
- `CAPPED(expr, p_low, p_high)`: numeric expr; 0 <= p_low < p_high <= 1.

Example:
    >>> import sqlglot
    >>> tree = sqlglot.parse_one("LEVELS(sector, 30)", dialect="duckdb")
    >>> call, problems = learned_call(tree)
    >>> call.function, call.arguments, problems
    ('LEVELS', (30,), [])
    >>> learned_call(sqlglot.parse_one("SPLINE(x, 9)", dialect="duckdb"))[1][0][1]
    'SPLINE takes 3 to 7 knots, not 9'
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction

from sqlglot import exp
from sqlglot.optimizer.annotate_types import annotate_types
from sqlglot.optimizer.qualify import qualify

from .canonical import canonical_sql
from .parse import TERM_DIALECT
from .types import TERM_TABLE, term_type

LEARNED_FUNCTIONS = ("LEVELS", "BINS", "SPLINE", "CAPPED")
MAX_BINS = 20
# Knot quantiles by number of knots: Harrell, Regression Modeling Strategies, 2nd ed., Table 2.3
# (recalled from memory, as the issue states them).
SPLINE_KNOTS = {
    3: (0.10, 0.5, 0.90),
    4: (0.05, 0.35, 0.65, 0.95),
    5: (0.05, 0.275, 0.5, 0.725, 0.95),
    6: (0.05, 0.23, 0.41, 0.59, 0.77, 0.95),
    7: (0.025, 0.1833, 0.3417, 0.5, 0.6583, 0.8167, 0.975),
}
USAGE = {
    "LEVELS": "LEVELS(expr, min_rows)",
    "BINS": "BINS(expr, k)",
    "SPLINE": "SPLINE(expr, k)",
    "CAPPED": "CAPPED(expr, p_low, p_high)",
}


@dataclass(frozen=True)
class LearnedCall:
    """A learned term's function and its constant arguments (after the expression)."""

    function: str
    arguments: tuple[float | int, ...]

    def quantiles(self) -> tuple[Fraction, ...]:
        """The training quantiles the function learns (none for LEVELS), exact: j/k for BINS, the decimal
        as written for SPLINE's table and CAPPED's arguments (repr gives back a literal's digits), so the
        rank ceil(q n) they select never moves with a float's last bit (9/14 as a double is above 9/14)."""
        if self.function == "BINS":
            k = int(self.arguments[0])
            return tuple(Fraction(j, k) for j in range(1, k))
        if self.function == "SPLINE":
            return tuple(Fraction(repr(q)) for q in SPLINE_KNOTS[int(self.arguments[0])])
        if self.function == "CAPPED":
            return tuple(Fraction(repr(float(p))) for p in self.arguments)
        return ()


def is_learned(expression: exp.Expression) -> bool:
    return isinstance(expression, exp.Anonymous) and expression.name.upper() in LEARNED_FUNCTIONS


def nested_learned(expression: exp.Expression) -> exp.Expression | None:
    """A learned call inside `expression` (not the expression itself): they may only stand alone."""
    for node in expression.walk():
        if node is not expression and is_learned(node):
            return node
    return None


def learned_call(expression: exp.Expression) -> tuple[LearnedCall | None, list[tuple[exp.Expression, str]]]:
    """The call of a learned-term expression, or the problems with its arguments (node, message)."""
    function = expression.name.upper()
    arguments = expression.expressions
    wanted = 3 if function == "CAPPED" else 2
    if len(arguments) != wanted:
        return None, [(expression, f"{function} takes {wanted} arguments: write {USAGE[function]}")]
    constants = []
    for node in arguments[1:]:
        value = _number(node)
        if value is None:
            return None, [(node, f"{function}'s arguments after the expression must be numbers: write {USAGE[function]}")]
        constants.append(value)
    problem = _range_problem(function, constants)
    if problem:
        return None, [(arguments[1], problem)]
    return LearnedCall(function, tuple(constants)), []


def _number(node: exp.Expression) -> float | int | None:
    negative = isinstance(node, exp.Neg)
    literal = node.this if negative else node
    if not isinstance(literal, exp.Literal) or literal.is_string:
        return None
    value = int(literal.this) if literal.is_int else float(literal.this)
    return -value if negative else value


def _range_problem(function: str, constants: list[float | int]) -> str | None:
    first = constants[0]
    whole = isinstance(first, int)
    if function == "LEVELS" and not (whole and first >= 1):
        return f"LEVELS needs min_rows as a whole number of at least 1, not {first}"
    if function == "BINS" and not (whole and 2 <= first <= MAX_BINS):
        return f"BINS takes 2 to {MAX_BINS} bins, not {first}"
    if function == "SPLINE" and not (whole and first in SPLINE_KNOTS):
        return f"SPLINE takes 3 to 7 knots, not {first}"
    if function == "CAPPED" and not 0 <= constants[0] < constants[1] <= 1:
        return f"CAPPED needs 0 <= p_low < p_high <= 1, not {constants[0]} and {constants[1]}"
    return None


def argument_type(call: LearnedCall, expression: exp.Expression, schema: dict[str, str]) -> tuple[str | None, list]:
    """('text' | 'whole' | 'numeric' | None, [(node, message)]) for a learned term's argument expression.

    LEVELS reads text or whole numbers (their levels are compared as text); the others read numbers.
    """
    declared = _declared_type(expression, schema)
    if declared is not None and declared.is_type(*exp.DataType.TEXT_TYPES):
        kind, problems = term_type(exp.Length(this=expression.copy()), schema)  # arithmetic inside still checked
        if not problems and call.function != "LEVELS":
            problems = [(expression, f"{call.function} reads a number, not a text expression")]
        return (None if problems else "text"), problems
    kind, problems = term_type(expression, schema)
    if problems:
        return None, problems
    if call.function == "LEVELS" and not (declared is not None and declared.is_type(*exp.DataType.INTEGER_TYPES)):
        return None, [(expression, "LEVELS reads text or whole numbers; for a decimal number use BINS(expr, k)")]
    if call.function != "LEVELS" and kind != "numeric":
        return None, [(expression, f"{call.function} reads a number, not a {kind} expression")]
    return ("whole" if call.function == "LEVELS" else "numeric"), []


def _declared_type(expression: exp.Expression, schema: dict[str, str]) -> exp.DataType | None:
    query = exp.select(exp.alias_(expression.copy(), "value")).from_(TERM_TABLE)
    tables = {TERM_TABLE: schema}
    query = qualify(query, schema=tables, dialect=TERM_DIALECT, validate_qualify_columns=False)
    return annotate_types(query, schema=tables, dialect=TERM_DIALECT).expressions[0].this.type


def call_sql(call: LearnedCall, argument: exp.Expression) -> str:
    """Canonical SQL of the whole call over the inlined argument: what the term's fingerprint covers."""
    constants = [exp.Literal.number(value) for value in call.arguments]
    return canonical_sql(exp.Anonymous(this=call.function, expressions=[argument.copy(), *constants]))
