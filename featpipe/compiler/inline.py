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


# Limits of a term once the terms it uses are inlined (each term alone has the parser's limits):
# generated SQL is rendered recursively, about 400 levels deep at most on a default Python stack
# (measured through check, sql, fit and score), and terms built from each other twice over double
# in size at every step.
MAX_INLINED_DEPTH = 250
MAX_INLINED_NODES = 20_000
# Parentheses and CASE nested in a written-out term: a fitted file stores it and scoring parses it
# again, and sqlglot's parser stops at about 40 levels on a default Python stack (measured).
MAX_INLINED_NESTING = 30


def inlined_shape(expressions: dict[str, exp.Expression], order: list[str]) -> dict[str, tuple[int, int]]:
    """(nodes, depth) of each term's tree as `inline_terms` would build it, computed without building it.

    >>> import sqlglot
    >>> trees = {"a": sqlglot.parse_one("x + 1"), "b": sqlglot.parse_one("a * a")}
    >>> inlined_shape(trees, ["a", "b"])
    {'a': (4, 2), 'b': (11, 4)}
    """
    shapes: dict[str, tuple[int, int]] = {}

    def term_reference(node: exp.Expression) -> tuple[int, int] | None:
        return shapes.get(node.name) if isinstance(node, exp.Column) and not node.table else None

    for name in order:
        nodes, depth = 0, 0
        for node in expressions[name].walk(prune=term_reference):
            used = term_reference(node)
            if used is None:
                nodes, depth = nodes + 1, max(depth, node.depth)
            else:  # replaced by (used term), one level deeper for the parentheses
                nodes, depth = nodes + 1 + used[0], max(depth, node.depth + 1 + used[1])
        shapes[name] = (nodes, depth)
    return shapes


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
