"""Portable-SQL hardening: rewrite a checked term so DuckDB, PostgreSQL, SQLite and Spark give one answer.

The engines disagree on edge cases (division by zero, LN and SQRT outside their domain, EXP overflow,
integer division, the type of a decimal literal, rounding of halves, one-argument LOG; measured on
every engine by tests/test_harden.py). Term files are DuckDB SQL, so the rewrite keeps DuckDB's meaning, computed in
DOUBLE throughout (DuckDB itself computes `0.3 * a` as an exact DECIMAL, so the last digits may
differ from DuckDB's own answer); where DuckDB would return inf or NaN, or another engine would
raise an error, it gives NULL (EXP saturates instead):

- every column and literal used as a number is CAST to DOUBLE (integer `7 / 2` is 3.5 everywhere);
- `a / b` divides by `NULLIF(b, 0)` (unless b already is `NULLIF(., 0)` or a non-zero literal);
- `a % b` becomes `a - b * trunc(a / b)` with the same guard (PostgreSQL has no `%` on DOUBLE, SQLite
  truncates operands to integers); the sign follows a, as in DuckDB; exact for whole numbers below
  2^52, last digits may differ from DuckDB's fmod for fractions, NULL when |a / b| >= 2^52;
- LN and LOG take `CASE WHEN x > 0 THEN x END`, SQRT `CASE WHEN x >= 0 THEN x END`;
  `LOG(b, x)` (and LOG10, which sqlglot reads as `LOG(10, x)`) becomes `LN(x) / LN(b)`: PostgreSQL
  has no two-argument LOG on DOUBLE and SQLite's LOG10(1000) is 2.9999999999999996;
- EXP's argument is clamped to [-700, 700] with a CASE (not GREATEST/LEAST, whose NULL rules differ);
- POWER(a, b) is NULL when a < 0 and b is not a whole number, or a = 0 and b < 0 (PostgreSQL raises,
  DuckDB gives NaN or inf); a literal exponent or base keeps only the guard it needs;
- ROUND rounds half away from zero on the scaled DOUBLE (PostgreSQL rounds half to even and has no
  ROUND(double, digits)); GREATEST/LEAST become CASE chains that are NULL when any argument is NULL
  (DuckDB, PostgreSQL and Spark skip NULLs, SQLite has neither: a missing input must stay missing, so a
  term never scores a row as `ok` on a value it did not have; COALESCE fills a NULL on purpose);
- CAST to an integer type rounds half to even (DuckDB and PostgreSQL do; SQLite and Spark truncate),
  CAST to DECIMAL(p, s) rounds half away from zero to s digits (SQLite does not round at all), and
  both are NULL out of the type's range; the result is a whole-number DOUBLE;
- CAST to BOOLEAN of a number becomes `x <> 0` (PostgreSQL cannot cast DOUBLE to BOOLEAN);
- a boolean used as a number becomes `CASE WHEN c THEN 1.0 WHEN NOT c THEN 0.0 END` (NULL stays NULL);
- DATE_DIFF('day', a, b) and the date parts are whole numbers (EXTRACT(YEAR FROM d) becomes YEAR(d));
  sqlgen/dates.py writes them per engine when rendering; a DATE 'YYYY-MM-DD' literal is kept as it is;
- IF becomes CASE. Identifiers and their quoting are kept as given.

Not covered: overflow beyond +-1.8e308 in +, -, *, / and POWER (DuckDB gives inf, PostgreSQL raises),
FLOOR/CEIL written in a term beyond +-9.2e18 (Spark's BIGINT result saturates), casts of malformed
text to numbers, CAST of a number to text ('1.0' or '1'), LOWER/UPPER of non-ASCII letters (SQLite
changes ASCII only), and the last digit of EXP/POWER on Spark (Java's math library). Arguments that
need a guard are repeated inside it, so deeply nested guarded functions grow the SQL.

Example:
    >>> import sqlglot
    >>> harden(sqlglot.parse_one("7 / x", dialect="duckdb")).sql(dialect="postgres")
    'CAST(7 AS DOUBLE PRECISION) / NULLIF(CAST(x AS DOUBLE PRECISION), 0)'
    >>> as_number(harden(sqlglot.parse_one("a > 1", dialect="duckdb")), is_boolean=True).sql(dialect="duckdb")
    'CASE WHEN a > 1 THEN CAST(1.0 AS DOUBLE) WHEN NOT (a > 1) THEN CAST(0.0 AS DOUBLE) END'
"""

from __future__ import annotations

from collections.abc import Mapping
from functools import lru_cache

from sqlglot import exp

from ..compiler.dates import DATE_FUNCTIONS, as_part_function
from .common import double, number

NUMBER, TRUTH, VALUE = "number", "truth", "value"  # how the parent uses a node's value
WHOLE = 2.0**52  # from here on every DOUBLE is a whole number
EXP_LIMIT = 700.0  # EXP(700) ~ 1e304 and EXP(-700) ~ 1e-304 are finite, normal DOUBLEs everywhere
_INTEGER_RANGE = {  # values that round into the type: [min - 0.5, max + 0.5), exact in DOUBLE
    exp.DataType.Type.TINYINT: (-128.5, 127.5),
    exp.DataType.Type.SMALLINT: (-32768.5, 32767.5),
    exp.DataType.Type.INT: (-2147483648.5, 2147483647.5),
    exp.DataType.Type.BIGINT: (-(2.0**63), 2.0**63),
}
_ARITHMETIC = (exp.Add, exp.Sub, exp.Mul)
_COMPARISONS = (exp.EQ, exp.NEQ, exp.GT, exp.GTE, exp.LT, exp.LTE)
_ALWAYS_DOUBLE = (exp.Add, exp.Sub, exp.Mul, exp.Div, exp.Neg, exp.Ln, exp.Exp, exp.Sqrt, exp.Pow, exp.Abs)


def harden(expression: exp.Expression, schema: Mapping[str, str] | None = None) -> exp.Expression:
    """A new tree computing `expression` identically on every engine; the input is not changed.

    `schema` maps column names to their declared types (featpipe.yaml `columns`): BOOLEAN columns
    used as numbers become 1.0/0.0 and text columns are not cast; without it, a column typed by
    sqlglot (`column.type`) is used, and any other column used as a number is taken to be numeric.
    The tree should have passed `check_allowed`; nodes outside the allow-list are copied unchanged.
    """
    types = {name: declared_type(kind) for name, kind in (schema or {}).items()}
    return _Hardening(types).rewrite(expression, VALUE)


@lru_cache(maxsize=256)
def declared_type(kind: str) -> exp.DataType:
    """A declared column type as a tree, parsed once: a design query hardens every term against every
    column of its input, and parsing the same few type names again was a visible part of `compute`.
    Shared between calls, so only read (`is_type`), never put into a tree."""
    return exp.DataType.build(kind, dialect="duckdb")


def as_number(expression: exp.Expression, is_boolean: bool) -> exp.Expression:
    """A hardened value as a DOUBLE: booleans as 1.0/0.0 (NULL stays NULL), numbers CAST to DOUBLE."""
    if is_boolean:
        return _one_zero(expression)
    return expression.copy() if _is_double(expression) else double(expression.copy())


class _Hardening:
    def __init__(self, types: dict[str, exp.DataType]):
        self.types = types
        self.folded = {name.lower(): kind for name, kind in types.items()}  # trees may hold normalized names

    def rewrite(self, node: exp.Expression, context: str) -> exp.Expression:
        if isinstance(node, exp.Paren):
            return exp.Paren(this=self.rewrite(node.this, context))
        if self.is_condition(node):
            truth = self.condition(node)
            return _one_zero(truth) if context == NUMBER else truth
        if isinstance(node, (exp.Column, exp.Literal, exp.Null)):
            return double(node.copy()) if context == NUMBER else node.copy()
        if isinstance(node, _ARITHMETIC):
            return type(node)(this=self.number(node.this), expression=self.number(node.expression))
        if isinstance(node, exp.Neg):
            return exp.Neg(this=self.number(node.this))
        if isinstance(node, exp.Div):
            return _divide(self.number(node.this), self.number(node.expression))
        if isinstance(node, exp.Mod):
            return self.modulo(node)
        if isinstance(node, exp.Abs):
            return exp.Abs(this=self.number(node.this))
        if isinstance(node, (exp.Sign, exp.Floor, exp.Ceil)):
            # SIGN is an INTEGER in SQLite, FLOOR and CEIL a BIGINT in Spark (so a sum of them would be too)
            whole = type(node)(this=self.number(node.this))
            return double(whole) if context == NUMBER else whole
        if isinstance(node, exp.Ln):
            return exp.Ln(this=_positive(self.number(node.this)))
        if isinstance(node, exp.Log):
            return self.logarithm(node)
        if isinstance(node, exp.Sqrt):
            return exp.Sqrt(this=_guarded(exp.GTE, self.number(node.this)))
        if isinstance(node, exp.Exp):
            return exp.Exp(this=_clamped(self.number(node.this)))
        if isinstance(node, exp.Pow):
            return _power(self.number(node.this), self.number(node.expression))
        if isinstance(node, exp.Round):
            digits = node.args.get("decimals")
            return _round_half_away(self.number(node.this), int(_literal_value(digits)) if digits else 0)
        if isinstance(node, (exp.Greatest, exp.Least)):
            return self.extreme(node, NUMBER if context == NUMBER else VALUE)
        if isinstance(node, (exp.Coalesce, exp.Nullif)):
            return self.rebuild(node, context)
        if isinstance(node, exp.Case):
            return self.case(node, context)
        if isinstance(node, exp.If):
            default = node.args.get("false")
            as_case = exp.Case(ifs=[exp.If(this=node.this.copy(), true=node.args["true"].copy())],
                               default=default.copy() if default else None)
            return self.case(as_case, context)
        if isinstance(node, (exp.Cast, exp.TryCast)):
            return self.cast(node, context)
        if isinstance(node, (exp.Lower, exp.Upper, exp.Trim, exp.Length)):
            text = self.rebuild(node, VALUE)
            return double(text) if context == NUMBER else text
        if isinstance(node, (*DATE_FUNCTIONS, exp.Extract)):  # a whole number; sqlgen/dates.py renders it per engine
            whole = self.rebuild(as_part_function(node), VALUE)
            return double(whole) if context == NUMBER else whole
        return node.copy()

    def number(self, node: exp.Expression) -> exp.Expression:
        return self.rewrite(node, NUMBER)

    def rebuild(self, node: exp.Expression, context: str) -> exp.Expression:
        """The same node with every expression argument rewritten in `context`."""
        args = {}
        for key, value in node.args.items():
            if isinstance(value, exp.Expression):
                value = self.rewrite(value, context)
            elif isinstance(value, list):
                value = [self.rewrite(v, context) if isinstance(v, exp.Expression) else v for v in value]
            args[key] = value
        return type(node)(**args)

    # Booleans

    def is_condition(self, node: exp.Expression) -> bool:
        """A node whose own value is a boolean (CASE, COALESCE and the like pass their context on)."""
        if isinstance(node, (exp.Predicate, exp.Connector, exp.Not, exp.Boolean)):
            return True
        if isinstance(node, exp.Column):
            return self.column_type(node) is not None and self.column_type(node).is_type(exp.DataType.Type.BOOLEAN)
        return isinstance(node, (exp.Cast, exp.TryCast)) and node.to.is_type(exp.DataType.Type.BOOLEAN)

    def is_boolean(self, node: exp.Expression) -> bool:
        if isinstance(node, exp.Paren):
            return self.is_boolean(node.this)
        if isinstance(node, (exp.Case, exp.If, exp.Coalesce, exp.Nullif)):
            return any(self.is_boolean(value) for value in _values(node))
        return self.is_condition(node)

    def is_text(self, node: exp.Expression) -> bool:
        if isinstance(node, exp.Paren):
            return self.is_text(node.this)
        if isinstance(node, (exp.Case, exp.If, exp.Coalesce, exp.Nullif)):
            return any(self.is_text(value) for value in _values(node))
        if isinstance(node, exp.Literal):
            return node.is_string
        if isinstance(node, exp.Column):
            return self.column_type(node) is not None and self.column_type(node).is_type(*exp.DataType.TEXT_TYPES)
        if isinstance(node, (exp.Cast, exp.TryCast)):
            return node.to.is_type(*exp.DataType.TEXT_TYPES)
        return isinstance(node, (exp.Lower, exp.Upper, exp.Trim))

    def column_type(self, column: exp.Column) -> exp.DataType | None:
        declared = self.types.get(column.name) or self.folded.get(column.name.lower())
        if declared is None and column.type is not None and not column.type.is_type(exp.DataType.Type.UNKNOWN):
            declared = column.type
        return declared

    def condition(self, node: exp.Expression) -> exp.Expression:
        """A boolean-valued node rewritten as a boolean."""
        if isinstance(node, (exp.And, exp.Or)):
            return type(node)(this=self.rewrite(node.this, TRUTH), expression=self.rewrite(node.expression, TRUTH))
        if isinstance(node, exp.Not):
            return exp.Not(this=self.rewrite(node.this, TRUTH))
        if isinstance(node, (*_COMPARISONS, exp.Between)):
            return self.rebuild(node, VALUE)
        if isinstance(node, exp.Is):
            return exp.Is(this=self.rewrite(node.this, VALUE), expression=node.expression.copy())
        if isinstance(node, exp.In):
            return exp.In(this=self.rewrite(node.this, VALUE), expressions=[v.copy() for v in node.expressions])
        if isinstance(node, (exp.Cast, exp.TryCast)):
            return self.to_boolean(node)
        return node.copy()

    # CASE and friends

    def case(self, node: exp.Case, context: str) -> exp.Case:
        operand = node.args.get("this")
        branches = [
            exp.If(this=self.rewrite(branch.this, VALUE if operand else TRUTH),
                   true=self.rewrite(branch.args["true"], context))
            for branch in node.args["ifs"]
        ]
        default = node.args.get("default")
        return exp.Case(this=self.rewrite(operand, VALUE) if operand else None, ifs=branches,
                        default=self.rewrite(default, context) if default else None)

    def extreme(self, node: exp.Greatest | exp.Least, context: str) -> exp.Expression:
        """GREATEST/LEAST as a CASE chain, NULL when any argument is NULL."""
        wins = exp.GTE if isinstance(node, exp.Greatest) else exp.LTE
        values = [self.rewrite(value, context) for value in [node.this, *node.expressions]]
        best = values[0]
        for value in values[1:]:
            keep = wins(this=_operand(best.copy()), expression=_operand(value.copy()))
            best = exp.Case(ifs=[exp.If(this=keep, true=best)], default=value)
        known = exp.and_(*(exp.Is(this=_operand(value.copy()), expression=exp.Null()).not_() for value in values))
        return exp.Case(ifs=[exp.If(this=known, true=best)])

    # Arithmetic that needs more than a cast

    def modulo(self, node: exp.Mod) -> exp.Expression:
        """a - b * trunc(a / b): DuckDB's remainder (sign of a); NULL for b = 0, and when |a / b| >= 2^52,
        where the remainder is below the DOUBLE resolution of a."""
        dividend, divisor = self.number(node.this), _nonzero(self.number(node.expression))
        quotient = _divide(dividend.copy(), divisor.copy())
        whole = exp.Mul(this=exp.Sign(this=quotient.copy()), expression=exp.Floor(this=exp.Abs(this=quotient.copy())))
        remainder = exp.Sub(this=_operand(dividend), expression=exp.Mul(this=_operand(divisor), expression=_operand(whole)))
        resolved = exp.LT(this=exp.Abs(this=quotient), expression=number(WHOLE))
        return exp.Case(ifs=[exp.If(this=resolved, true=remainder)])

    def logarithm(self, node: exp.Log) -> exp.Expression:
        if node.expression is None:
            raise ValueError("one-argument LOG is ambiguous across engines; check_allowed rejects it")
        base, value = self.number(node.this), self.number(node.expression)
        known = _literal_value(base)
        if known is not None and known > 0 and known != 1:
            denominator = exp.Ln(this=base)
        else:  # base 1 or not above 0: NULL
            denominator = exp.Nullif(this=exp.Ln(this=_positive(base)), expression=exp.Literal.number(0))
        return exp.Paren(this=_quotient(exp.Ln(this=_positive(value)), denominator))

    # Casts

    def cast(self, node: exp.Cast, context: str) -> exp.Expression:
        target, operand = node.to, node.this
        if target.is_type(exp.DataType.Type.DATE):  # DATE 'YYYY-MM-DD', the only date cast a term may hold
            return node.copy()
        if target.is_type(*exp.DataType.TEXT_TYPES):
            text = self.to_text(node)
            return double(text) if context == NUMBER else text
        if self.is_text(operand):  # text to a number: one CAST (or TRY_CAST) to DOUBLE, then as for numbers
            value = type(node)(this=self.rewrite(operand, VALUE), to=exp.DataType.build("DOUBLE"))
        else:
            value = self.number(operand)
        if target.is_type(exp.DataType.Type.DOUBLE) or self.is_boolean(operand):
            return value
        if target.is_type(*_INTEGER_RANGE):
            low, high = _INTEGER_RANGE[target.this]
            return _within(value, low, high, _round_half_even(value))
        if target.is_type(exp.DataType.Type.DECIMAL):
            precision, scale = _decimal_size(target)
            rounded = _round_half_away(value, scale)
            limit = number(10.0 ** (precision - scale))
            return exp.Case(ifs=[exp.If(this=exp.LT(this=exp.Abs(this=rounded.copy()), expression=limit), true=rounded)])
        return node.copy()

    def to_boolean(self, node: exp.Cast) -> exp.Expression:
        operand = node.this
        if self.is_boolean(operand):
            return self.rewrite(operand, TRUTH)
        if self.is_text(operand):  # 'true'/'false': SQLite would read them as 0
            return type(node)(this=self.rewrite(operand, VALUE), to=node.to.copy())
        return exp.Paren(this=exp.NEQ(this=_operand(self.number(operand)), expression=exp.Literal.number(0)))

    def to_text(self, node: exp.Cast) -> exp.Expression:
        operand = node.this
        if self.is_boolean(operand):  # DuckDB and PostgreSQL write 'true'/'false', SQLite '1'/'0'
            truth = self.rewrite(operand, TRUTH)
            return exp.Case(ifs=[exp.If(this=truth, true=exp.Literal.string("true")),
                                 exp.If(this=exp.Not(this=exp.Paren(this=truth.copy())), true=exp.Literal.string("false"))])
        return type(node)(this=self.rewrite(operand, VALUE), to=exp.DataType.build("TEXT"))


def _values(node: exp.Expression) -> list[exp.Expression]:
    """The expressions whose value a CASE, IF, COALESCE or NULLIF can return."""
    if isinstance(node, exp.Case):
        values = [branch.args["true"] for branch in node.args["ifs"]]
        return values + ([node.args["default"]] if node.args.get("default") else [])
    if isinstance(node, exp.If):
        return [node.args["true"]] + ([node.args["false"]] if node.args.get("false") else [])
    if isinstance(node, exp.Nullif):
        return [node.this]
    return [node.this, *node.expressions]


def _one_zero(truth: exp.Expression) -> exp.Expression:
    """CASE WHEN c THEN 1.0 WHEN NOT c THEN 0.0 END: NULL stays NULL, and no engine casts a boolean."""
    if isinstance(truth, exp.Boolean):
        return number(1.0 if truth.this else 0.0)
    return exp.Case(ifs=[
        exp.If(this=truth.copy(), true=number(1.0)),
        exp.If(this=exp.Not(this=exp.Paren(this=truth.copy())), true=number(0.0)),
    ])


def _operand(node: exp.Expression) -> exp.Expression:
    """Parenthesized when it is an operator, so that placing it inside a new operator keeps its meaning."""
    return exp.Paren(this=node) if isinstance(node, (exp.Binary, exp.Unary, exp.Predicate)) and not isinstance(node, exp.Paren) else node


def _literal_value(node: exp.Expression | None) -> float | None:
    """The number a literal (possibly negated, parenthesized or CAST to DOUBLE) stands for."""
    sign = 1.0
    while isinstance(node, (exp.Paren, exp.Neg, exp.Cast)):
        if isinstance(node, exp.Neg):
            sign = -sign
        elif isinstance(node, exp.Cast) and not node.to.is_type(exp.DataType.Type.DOUBLE):
            return None
        node = node.this
    if isinstance(node, exp.Literal) and not node.is_string:
        return sign * float(node.this)
    return None


def _quotient(dividend: exp.Expression, divisor: exp.Expression) -> exp.Div:
    # typed=True: the operands are DOUBLE already, so sqlglot adds no cast of its own when rendering
    # for PostgreSQL or SQLite (it does for a plain DuckDB division).
    return exp.Div(this=_operand(dividend), expression=_operand(divisor), typed=True, safe=False)


def _divide(dividend: exp.Expression, divisor: exp.Expression) -> exp.Div:
    return _quotient(dividend, _nonzero(divisor))


def _nonzero(divisor: exp.Expression) -> exp.Expression:
    """NULLIF(divisor, 0), unless it already is one or is a non-zero literal."""
    inner = divisor
    while isinstance(inner, exp.Paren):
        inner = inner.this
    if isinstance(inner, exp.Nullif) and _literal_value(inner.expression) == 0:
        return divisor
    known = _literal_value(divisor)
    if known is not None and known != 0:
        return divisor
    return exp.Nullif(this=divisor, expression=exp.Literal.number(0))


def _guarded(comparison: type[exp.Binary], value: exp.Expression) -> exp.Expression:
    """CASE WHEN value <comparison> 0 THEN value END (a literal that passes is left as it is)."""
    known = _literal_value(value)
    if known is not None and (known > 0 or comparison is exp.GTE and known == 0):
        return value
    test = comparison(this=_operand(value.copy()), expression=exp.Literal.number(0))
    return exp.Case(ifs=[exp.If(this=test, true=value)])


def _positive(value: exp.Expression) -> exp.Expression:
    return _guarded(exp.GT, value)


def _clamped(value: exp.Expression) -> exp.Expression:
    known = _literal_value(value)
    if known is not None and -EXP_LIMIT <= known <= EXP_LIMIT:
        return value
    return exp.Case(ifs=[
        exp.If(this=exp.GT(this=_operand(value.copy()), expression=number(EXP_LIMIT)), true=number(EXP_LIMIT)),
        exp.If(this=exp.LT(this=_operand(value.copy()), expression=number(-EXP_LIMIT)), true=number(-EXP_LIMIT)),
    ], default=value)


def _power(base: exp.Expression, exponent: exp.Expression) -> exp.Expression:
    """POWER, NULL where the result is not a real number (a < 0, b fractional) or infinite (0 to b < 0)."""
    known_base, known_exponent = _literal_value(base), _literal_value(exponent)
    zero = exp.Literal.number(0)
    if known_base is not None and known_base > 0:
        allowed = None
    elif known_exponent is not None:
        if known_exponent == int(known_exponent):
            allowed = None if known_exponent >= 0 else exp.NEQ(this=_operand(base.copy()), expression=zero)
        else:
            comparison = exp.GTE if known_exponent > 0 else exp.GT
            allowed = comparison(this=_operand(base.copy()), expression=zero)
    else:
        allowed = exp.or_(
            exp.GT(this=_operand(base.copy()), expression=zero),
            exp.and_(exp.EQ(this=_operand(base.copy()), expression=zero),
                     exp.GTE(this=_operand(exponent.copy()), expression=zero)),
            exp.and_(exp.LT(this=_operand(base.copy()), expression=zero),
                     exp.EQ(this=_operand(exponent.copy()), expression=exp.Floor(this=exponent.copy()))),
        )
    power = exp.Pow(this=base, expression=exponent)
    return power if allowed is None else exp.Case(ifs=[exp.If(this=allowed, true=power)])


def _round_half_away(value: exp.Expression, digits: int) -> exp.Expression:
    """SIGN(x) * (|x| * 10^digits rounded half up) / 10^digits, exact on that scaled DOUBLE.

    From 2^52 on a DOUBLE is whole already and is kept as it is (so Spark never floors it into a BIGINT).
    """
    size = exp.Abs(this=value.copy())
    if digits > 0:
        size = exp.Mul(this=size, expression=number(10.0**digits))
    elif digits < 0:
        size = _quotient(size, number(10.0**-digits))
    fraction = exp.Sub(this=_operand(size.copy()), expression=exp.Floor(this=size.copy()))
    rounded = exp.Case(
        ifs=[exp.If(this=exp.GTE(this=_operand(size.copy()), expression=number(WHOLE)), true=size.copy()),
             exp.If(this=exp.GTE(this=fraction, expression=number(0.5)), true=exp.Ceil(this=size.copy()))],
        default=exp.Floor(this=size.copy()),
    )
    signed = exp.Mul(this=exp.Sign(this=value), expression=rounded)
    if digits > 0:
        signed = _quotient(signed, number(10.0**digits))
    elif digits < 0:
        signed = exp.Mul(this=signed, expression=number(10.0**-digits))
    return exp.Paren(this=signed)


def _round_half_even(value: exp.Expression) -> exp.Expression:
    """The whole number nearest x, ties to even (CAST of DOUBLE to an integer in DuckDB/PostgreSQL); exact."""
    fraction = exp.Sub(this=_operand(value.copy()), expression=exp.Floor(this=value.copy()))
    half = exp.Add(this=_quotient(value.copy(), number(2.0)), expression=number(0.5))
    return exp.Case(ifs=[
        exp.If(this=exp.EQ(this=fraction, expression=number(0.5)),
               true=exp.Mul(this=number(2.0), expression=exp.Floor(this=half))),
        exp.If(this=exp.LT(this=fraction.copy(), expression=number(0.5)), true=exp.Floor(this=value.copy())),
    ], default=exp.Ceil(this=value.copy()))


def _decimal_size(target: exp.DataType) -> tuple[int, int]:
    """(precision, scale) of a DECIMAL type; DuckDB's default DECIMAL is DECIMAL(18, 3)."""
    sizes = [int(_literal_value(parameter.this)) for parameter in target.expressions]
    return (sizes[0], sizes[1] if len(sizes) > 1 else 0) if sizes else (18, 3)


def _within(value: exp.Expression, low: float, high: float, result: exp.Expression) -> exp.Expression:
    """result when low <= value < high, else NULL (where the engines raise an out-of-range error)."""
    inside = exp.and_(exp.GTE(this=_operand(value.copy()), expression=number(low)),
                      exp.LT(this=_operand(value.copy()), expression=number(high)))
    return exp.Case(ifs=[exp.If(this=inside, true=result)])


def _is_double(node: exp.Expression) -> bool:
    """Whether a hardened node is a DOUBLE on every engine already (so as_number adds no cast)."""
    if isinstance(node, exp.Paren):
        return _is_double(node.this)
    if isinstance(node, exp.Cast):
        return node.to.is_type(exp.DataType.Type.DOUBLE)
    if isinstance(node, exp.Case):
        values = [branch.args["true"] for branch in node.args["ifs"]] + [node.args.get("default") or exp.Null()]
        return all(isinstance(value, exp.Null) or _is_double(value) for value in values) and not all(
            isinstance(value, exp.Null) for value in values)
    return isinstance(node, _ALWAYS_DOUBLE)
