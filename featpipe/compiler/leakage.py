"""Leakage: no term of a model may read the model's target, directly or through other terms.

Example:
    >>> target_paths("defaulted", "late_and_defaulted", {"late_and_defaulted": {"flag"}, "flag": set()},
    ...              {"late_and_defaulted": {"late"}, "flag": {"defaulted"}})
    ['late_and_defaulted -> flag -> defaulted']
"""

from __future__ import annotations


def target_paths(target: str, term: str, uses: dict[str, set[str]], columns: dict[str, set[str]]) -> list[str]:
    """Every chain of term references from `term` that ends at the target column."""
    paths = []

    def walk(name: str, path: list[str]) -> None:
        if target in columns.get(name, set()):
            paths.append(" -> ".join(path + [name, target]))
        for used in sorted(uses.get(name, ())):
            if used not in path:
                walk(used, path + [name])

    walk(term, [])
    return paths
