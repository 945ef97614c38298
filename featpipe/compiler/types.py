"""Infer each term's type from the column contract; a term must be numeric or boolean, arithmetic
reads numbers, and LENGTH, LOWER, UPPER and TRIM read text.

Every value is of one kind: a number, text, a condition (boolean), a date or a timestamp. What the
engines would refuse when run (PostgreSQL is the strictest) or answer differently is refused here, so
nothing `check` passes fails at `compute` for a type: comparing values of different kinds, a condition
that is not boolean (CASE WHEN x, x AND y), CASE, IF and COALESCE values of different kinds,
arithmetic on dates (`d1 - d2`: write DATE_DIFF('day', d2, d1)), casts of dates, and date functions
given anything but a date. Each message says what to write instead.

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
    problems += _kind_problems(expression, schema)
    if problems:
        return None, problems
    result = value.type
    if result is not None and result.is_type(exp.DataType.Type.BOOLEAN):
        return "boolean", []
    if result is not None and result.is_type(*exp.DataType.REAL_TYPES, *exp.DataType.INTEGER_TYPES):
        return "numeric", []
    shown = result.sql() if result is not None else "unknown"
    advice = _DATE_ADVICE if result is not None and result.is_type(*exp.DataType.TEMPORAL_TYPES) else (
        "turn text into indicators, e.g. CASE WHEN x = 'a' THEN 1 ELSE 0 END")
    return None, [(expression, f"a term must be numeric or boolean, but this expression is {shown}; {advice}")]


def _original(original: exp.Expression, qualified: exp.Expression) -> exp.Expression:
    """The node of the user's tree matching a node of the qualified copy (same column name)."""
    column = qualified if isinstance(qualified, exp.Column) else qualified.find(exp.Column)
    if column is not None:
        for node in original.find_all(exp.Column):
            if node.name == column.name:
                return node
    return original


# Kinds of value, as messages name them.
NUMBER, TEXT, CONDITION, DATE, TIMESTAMP = "the number", "the text", "the condition", "the date", "the timestamp"
_DATE_ADVICE = "use DATE_DIFF('day', start, end) for a number of days, or YEAR, MONTH, DAY, ISODOW for its parts"
_COMPARISONS = (exp.EQ, exp.NEQ, exp.GT, exp.GTE, exp.LT, exp.LTE)
_CONDITIONS = (exp.Predicate, exp.Connector, exp.Not, exp.Boolean)
_DATE_ARGUMENTS = {exp.DateDiff: "DATE_DIFF", exp.Year: "YEAR", exp.Month: "MONTH", exp.Day: "DAY", exp.DayOfWeekIso: "ISODOW"}
_COMPARE_ADVICE = {
    frozenset({NUMBER, TEXT}): "compare numbers with numbers (x = 5, not x = '5'), or CAST the text to DOUBLE",
    frozenset({NUMBER, CONDITION}): "use the condition itself: c for c = 1 or c = TRUE, NOT c for c = 0",
    frozenset({TEXT, CONDITION}): "use the condition itself: c, or NOT c",
    frozenset({DATE, NUMBER}): "compare a date with a date (d >= DATE '2024-01-01') or a part of it with a number (YEAR(d) >= 2024)",
    frozenset({DATE, TEXT}): "write the date as a literal, e.g. DATE '2024-01-01'",
}
_CONDITION_EXAMPLE = {NUMBER: "{x} <> 0", TEXT: "{x} = 'a'", DATE: "{x} >= DATE '2024-01-01'", TIMESTAMP: "{x} IS NOT NULL"}


def _kind_of_type(data_type: exp.DataType) -> str | None:
    if data_type.is_type(exp.DataType.Type.BOOLEAN):
        return CONDITION
    if data_type.is_type(*exp.DataType.REAL_TYPES, *exp.DataType.INTEGER_TYPES):
        return NUMBER
    if data_type.is_type(*exp.DataType.TEXT_TYPES):
        return TEXT
    if data_type.is_type(exp.DataType.Type.DATE, exp.DataType.Type.DATE32):
        return DATE
    if data_type.is_type(*exp.DataType.TEMPORAL_TYPES):
        return TIMESTAMP
    return None


def _kind(node: exp.Expression, types: dict[str, exp.DataType]) -> str | None:
    """The kind of a node's value; None for NULL, which fits any kind, and for what is not known."""
    while isinstance(node, exp.Paren):
        node = node.this
    if isinstance(node, exp.Column):
        declared = types.get(node.name) or types.get(node.name.lower())
        return _kind_of_type(declared) if declared is not None else None
    if isinstance(node, exp.Literal):
        return TEXT if node.is_string else NUMBER
    if isinstance(node, (exp.Cast, exp.TryCast)):
        return _kind_of_type(node.to)
    if isinstance(node, _CONDITIONS):
        return CONDITION
    if isinstance(node, (exp.Lower, exp.Upper, exp.Trim)):
        return TEXT
    if isinstance(node, (ARITHMETIC, exp.Length, exp.Extract, *_DATE_ARGUMENTS)):
        return NUMBER
    if isinstance(node, (exp.Case, exp.If, exp.Coalesce, exp.Nullif)):
        kinds = [kind for kind in (_kind(value, types) for value in _values(node)) if kind is not None]
        return kinds[0] if kinds else None
    return None


def _values(node: exp.Expression) -> list[exp.Expression]:
    """The expressions whose value a CASE, IF, COALESCE or NULLIF can return."""
    if isinstance(node, exp.Case):
        return [branch.args["true"] for branch in node.args["ifs"]] + [node.args["default"]] * bool(node.args.get("default"))
    if isinstance(node, exp.If):
        return [node.args["true"]] + [node.args["false"]] * bool(node.args.get("false"))
    if isinstance(node, exp.Nullif):
        return [node.this]
    return [node.this, *node.expressions]


def _named(kind: str, node: exp.Expression) -> str:
    return f"{kind} '{node.name}'" if isinstance(node, exp.Column) else f"{kind} {node.sql(dialect=TERM_DIALECT)}"


def _kind_problems(expression: exp.Expression, schema: dict[str, str]) -> list[tuple[exp.Expression, str]]:
    """Values of the wrong kind where the engines would refuse them or answer differently."""
    types = {name: exp.DataType.build(kind, dialect=TERM_DIALECT) for name, kind in schema.items()}
    types.update({name.lower(): kind for name, kind in types.items()})
    problems: list[tuple[exp.Expression, str]] = []

    def kind(node):
        return _kind(node, types)

    def compare(left, right):
        found = kind(left), kind(right)
        if None in found or found[0] == found[1]:
            return
        advice = _COMPARE_ADVICE.get(frozenset(found), "compare values of one kind")
        if set(found) == {DATE, TEXT}:
            text = right if found[1] == TEXT else left
            if isinstance(text, exp.Literal):
                advice = f"write the date as a literal, DATE {text.sql(dialect=TERM_DIALECT)}"
        problems.append((right, f"compares {_named(found[0], left)} with {_named(found[1], right)}, which engines "
                                f"refuse or answer differently; {advice}"))

    def condition(node):
        found = kind(node)
        if found not in (None, CONDITION):
            example = _CONDITION_EXAMPLE[found].format(x=node.name if isinstance(node, exp.Column) else node.sql(dialect=TERM_DIALECT))
            problems.append((node, f"{_named(found, node)} stands where a condition is needed, which PostgreSQL and Spark "
                                   f"refuse; write a comparison, e.g. {example}"))

    for node in expression.walk():
        if isinstance(node, _COMPARISONS):
            compare(node.this, node.expression)
        elif isinstance(node, exp.Between):
            compare(node.this, node.args["low"])
            compare(node.this, node.args["high"])
        elif isinstance(node, exp.In):
            for value in node.expressions:
                compare(node.this, value)
        elif isinstance(node, exp.Nullif):
            compare(node.this, node.expression)
        elif isinstance(node, (exp.And, exp.Or)):
            condition(node.this)
            condition(node.expression)
        elif isinstance(node, exp.Not):
            condition(node.this)
        if isinstance(node, exp.Case):
            for branch in node.args["ifs"]:
                if node.this:
                    compare(node.this, branch.this)
                else:
                    condition(branch.this)
        if isinstance(node, exp.If) and not isinstance(node.parent, exp.Case):
            condition(node.this)
        if isinstance(node, (exp.Case, exp.Coalesce)) or isinstance(node, exp.If) and not isinstance(node.parent, exp.Case):
            _mixed_values(node, kind, problems)
        if isinstance(node, ARITHMETIC):
            operands = list(node.iter_expressions())
            if isinstance(node, exp.Sub) and all(kind(operand) in (DATE, TIMESTAMP) for operand in operands):
                later, earlier = (o.name if isinstance(o, exp.Column) else o.sql(dialect=TERM_DIALECT) for o in operands)
                problems.append((node, f"{later} - {earlier} subtracts dates, which engines answer differently (a number "
                                       f"of days, an INTERVAL, or an error); write DATE_DIFF('day', {earlier}, {later}) "
                                       f"for the days from {earlier} to {later}"))
                continue
            for operand in operands:
                if kind(operand) in (DATE, TIMESTAMP):
                    problems.append((operand, f"arithmetic on {_named(kind(operand), operand)}: engines add, subtract "
                                              f"and convert dates differently; {_DATE_ADVICE}"))
        if isinstance(node, (exp.Cast, exp.TryCast)) and kind(node.this) in (DATE, TIMESTAMP):
            target = node.to.sql(dialect=TERM_DIALECT)
            problems.append((node.this, f"CAST of {_named(kind(node.this), node.this)} to {target}: engines turn dates "
                                        f"into numbers or text differently, or refuse; {_DATE_ADVICE}"))
        if isinstance(node, (*_DATE_ARGUMENTS, exp.Extract)):
            name = _DATE_ARGUMENTS.get(type(node)) or node.this.name.upper()
            for argument in (node.this, node.expression) if isinstance(node, exp.DateDiff) else (
                    node.expression if isinstance(node, exp.Extract) else node.this,):
                found = kind(argument)
                if found not in (None, DATE):
                    problems.append((argument, f"{name} reads a date, but {_named(found, argument)} is not one; give it "
                                               "a column declared DATE in featpipe.yaml or a literal DATE 'YYYY-MM-DD'"))
        if isinstance(node, TEXT_FUNCTIONS) and kind(node.this) in (DATE, TIMESTAMP):
            problems.append((node.this, f"{node.sql_name()} takes text, but {_named(kind(node.this), node.this)} is not "
                                        f"text; {_DATE_ADVICE}"))
    return problems


def _mixed_values(node: exp.Expression, kind, problems: list[tuple[exp.Expression, str]]) -> None:
    """CASE, IF and COALESCE give one kind of value (PostgreSQL: "CASE types boolean and integer cannot be matched")."""
    known = [(value, kind(value)) for value in _values(node) if kind(value) is not None]
    for value, found in known[1:]:
        if found != known[0][1]:
            first, first_kind = known[0]
            what = "COALESCE" if isinstance(node, exp.Coalesce) else "CASE"
            problems.append((value, f"{what} gives {_named(first_kind, first)} and {_named(found, value)}, which engines "
                                    "refuse or convert differently; give every value one kind: numbers throughout "
                                    "(for a condition c, CASE WHEN c THEN 1 ELSE 0 END) or conditions throughout"))
            return
