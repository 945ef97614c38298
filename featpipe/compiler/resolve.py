"""Resolve every name a term uses to an input column or another term of the same input.

A name matches a declared column whatever its case (`gnpdefl`, `Gnpdefl` and `"GNPDEFL"` all read the
column declared `GNPDEFL`): term files are DuckDB SQL, where identifiers are case-insensitive, quoted or
not. A column qualified by the term's own input
(`leases.p` in a file reading FROM leases) is that input's column; any other qualifier is refused.
Every resolved column is rewritten as the quoted declared name, so later passes and the generated SQL
see one spelling.

Example:
    >>> import sqlglot
    >>> from featpipe.compiler.parse import RawTerm
    >>> ratio = RawTerm("ratio", "leases", "t.sql", 1, 1, "", sqlglot.parse_one("leases.p / r"))
    >>> terms, uses, problems = resolve_names([ratio], {"leases": {"p": "DOUBLE", "r": "DOUBLE"}}, {"t.sql": "p / r"})
    >>> terms[0].expression.sql(), uses, problems
    ('"p" / "r"', {'ratio': set()}, {})
"""

from __future__ import annotations

import difflib
from dataclasses import replace

from sqlglot import exp

from ..errors import Diagnostic
from .parse import RawTerm, node_position


def resolve_names(
    terms: list[RawTerm], columns_by_input: dict[str, dict[str, str]], texts: dict[str, str]
) -> tuple[list[RawTerm], dict[str, set[str]], dict[str, list[Diagnostic]]]:
    """The terms with their own input's qualifier dropped; for each term, the other terms it uses
    directly, and its problems (unknown names get a "did you mean")."""
    terms = [replace(term, expression=with_declared_columns(term.expression, term.input, columns_by_input.get(term.input, {})))
             for term in terms]
    by_name = {term.name: term for term in terms}
    uses: dict[str, set[str]] = {}
    problems: dict[str, list[Diagnostic]] = {}
    for term in terms:
        columns = columns_by_input.get(term.input, {})
        uses[term.name] = set()
        problems[term.name] = diagnostics = []
        for reference in term.expression.find_all(exp.Column):
            line, col = node_position(texts[term.file], reference)

            def problem(message: str) -> None:
                diagnostics.append(Diagnostic(term.file, line, col, message))

            name = reference.name
            if reference.table and reference.table != term.input:
                problem(f"'{reference.table}.{name}' names another table; a term reads only its input '{term.input}'")
            elif name in columns:
                continue
            elif name in by_name and by_name[name].input == term.input:
                uses[term.name].add(name)
            elif name in by_name:
                problem(f"term '{name}' is computed over input '{by_name[name].input}', not '{term.input}'; "
                        "terms of different inputs may not mix")
            else:
                candidates = sorted(set(columns) | {t.name for t in terms if t.input == term.input})
                hint = difflib.get_close_matches(name, candidates, n=1)
                advice = f"did you mean '{hint[0]}'?" if hint else "declare it among the input's columns or define it as a term"
                problem(f"unknown name '{name}': not a column of input '{term.input}' nor a term; {advice}")
    return terms, uses, {name: found for name, found in problems.items() if found}


def with_declared_columns(expression: exp.Expression, input_name: str, columns: dict[str, str]) -> exp.Expression:
    """A copy of `expression` in which each column reference (unqualified or qualified by its own input)
    is the quoted declared name; other names are left for the checks (positions kept). The spec's
    offset goes through it too."""
    by_lower_case = {name.lower(): name for name in columns}
    tree = expression.copy()
    for reference in tree.find_all(exp.Column):
        if reference.table not in ("", input_name):
            continue
        written = reference.this
        declared = by_lower_case.get(written.name.lower())
        if declared is not None:
            identifier = exp.to_identifier(declared, quoted=True)
            identifier.meta.update(written.meta)
            reference.set("this", identifier)
        reference.set("table", None)
    return tree
