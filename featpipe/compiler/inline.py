"""Order terms by their dependencies, report cycles in full, and inline references.

After inlining, a term's expression names input columns only, so generated SQL never relies on
lateral aliases.

Example:
    >>> import sqlglot
    >>> order, problems = dependency_order({"b": {"a"}, "a": set()})
    >>> order
    ['a', 'b']
    >>> inlined = inline_terms({"a": sqlglot.parse_one("x + 1"), "b": sqlglot.parse_one("a * 2")}, order)
    >>> inlined["b"].sql()
    '(x + 1) * 2'
"""

from __future__ import annotations

from sqlglot import exp


def dependency_order(uses: dict[str, set[str]]) -> tuple[list[str], list[list[str]]]:
    """Terms so that each comes after the terms it uses, and every cycle as a closed path."""
    order: list[str] = []
    state: dict[str, str] = {}  # "visiting" or "done"
    cycles: list[list[str]] = []

    def visit(name: str, path: list[str]) -> None:
        if state.get(name) == "done":
            return
        if state.get(name) == "visiting":
            cycles.append(path[path.index(name):] + [name])
            return
        state[name] = "visiting"
        for used in sorted(uses.get(name, ())):
            visit(used, path + [name])
        state[name] = "done"
        order.append(name)

    for name in sorted(uses):
        visit(name, [])
    return order, cycles


def inline_terms(expressions: dict[str, exp.Expression], order: list[str]) -> dict[str, exp.Expression]:
    """Replace each reference to a term by its (already inlined) expression, in parentheses."""
    inlined: dict[str, exp.Expression] = {}
    for name in order:
        tree = expressions[name].copy()
        for reference in list(tree.find_all(exp.Column)):
            if reference.name in inlined and not reference.table:
                replacement = exp.Paren(this=inlined[reference.name].copy())
                if reference is tree:
                    tree = replacement
                else:
                    reference.replace(replacement)
        inlined[name] = tree
    return inlined
