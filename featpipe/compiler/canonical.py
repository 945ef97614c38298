"""Canonical SQL and fingerprints: formatting, comments, case, quoting, redundant parentheses and
the spelling of a number or of a date part (EXTRACT(YEAR FROM d) is YEAR(d)) do not change them; any
change of meaning does.

Numbers are written by value (`0.30` as 0.3, `1e3` and `1000.0` as 1000): every number in generated
SQL is cast to DOUBLE before arithmetic (sqlgen/harden.py), so the spelling never changes a result.

Example:
    >>> import sqlglot
    >>> canonical_sql(sqlglot.parse_one("((A + b)) * c -- note", dialect="duckdb"))
    '("a" + "b") * "c"'
    >>> canonical_sql(sqlglot.parse_one("x * 0.30 + 1e3", dialect="duckdb"))
    '"x" * 0.3 + 1000'
    >>> fingerprint(sqlglot.parse_one("(a+b)*c")) == fingerprint(sqlglot.parse_one("a + b * c"))
    False
"""

from __future__ import annotations

import hashlib
from decimal import Decimal

from sqlglot import exp
from sqlglot.optimizer.normalize_identifiers import normalize_identifiers

from .dates import as_part_function

CANONICAL_DIALECT = "duckdb"
# Unquoted names are lower-cased and quoted ones kept as written (PostgreSQL's rule; DuckDB's own would
# lower-case quoted names too): the resolver writes every column as its quoted declared name, so a
# column declared `GNPDEFL` stays "GNPDEFL" for the engines where case matters.
NAME_CASE_DIALECT = "postgres"

# Binding strength of operators, weakest first; nodes absent here (columns, literals, functions,
# CASE) are delimited and never need parentheses.
_LEVELS: list[tuple[type, ...]] = [
    (exp.Or,),
    (exp.And,),
    (exp.Not,),
    (exp.EQ, exp.NEQ, exp.GT, exp.GTE, exp.LT, exp.LTE, exp.Is, exp.Like, exp.ILike, exp.In,
     exp.Between, exp.NullSafeEQ, exp.NullSafeNEQ),
    (exp.DPipe,),
    (exp.Add, exp.Sub),
    (exp.Mul, exp.Div, exp.Mod, exp.IntDiv),
    (exp.Neg, exp.BitwiseNot),
]


_COMPARISON = 3


def _precedence(node: exp.Expression) -> int | None:
    for level, kinds in enumerate(_LEVELS):
        if isinstance(node, kinds):
            return level
    return None


def canonical_tree(expression: exp.Expression) -> exp.Expression:
    """A copy with identifiers normalized, comments dropped and exactly the parentheses the tree needs."""
    tree = normalize_identifiers(expression.copy(), dialect=NAME_CASE_DIALECT)
    for node in reversed(list(tree.walk())):
        node.comments = None
        if isinstance(node, exp.Extract):  # EXTRACT(YEAR FROM d) is YEAR(d)
            spelled = as_part_function(node)
            tree = spelled if node is tree else tree
            node.replace(spelled)
        if isinstance(node, exp.Literal) and node.is_number:
            node.set("this", _by_value(node.this))
        if isinstance(node, exp.Paren) and node is not tree:
            node.replace(node.this)
    while isinstance(tree, exp.Paren):
        tree = tree.this.pop()
    for node in reversed(list(tree.walk())):
        level = _precedence(node)
        if level is None:
            continue
        for key, child in list(node.args.items()):
            if not isinstance(child, exp.Expression):
                continue
            child_level = _precedence(child)
            if child_level is None:
                continue
            associates_left = isinstance(node, exp.Binary) and key == "this" and level != _COMPARISON
            if child_level < level or (child_level == level and not associates_left):
                child.replace(exp.Paren(this=child.copy()))
    return tree


def _by_value(number: str) -> str:
    """A numeric literal's text in plain decimal notation without redundant zeros ('1.50e2' -> '150')."""
    text = format(Decimal(number).normalize(), "f")
    return text if text != "-0" else "0"


def canonical_sql(expression: exp.Expression) -> str:
    return canonical_tree(expression).sql(
        dialect=CANONICAL_DIALECT, identify=True, comments=False, normalize_functions="upper"
    )


def fingerprint_of_sql(sql: str) -> str:
    return hashlib.sha256(sql.encode("utf-8")).hexdigest()[:16]


def fingerprint(expression: exp.Expression) -> str:
    """A short hash of the canonical SQL of a fully inlined expression."""
    return fingerprint_of_sql(canonical_sql(expression))
