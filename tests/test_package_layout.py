"""The package's folders are stages that data flows through one way: no folder imports one above it.

The order is DEVELOPERS.md's architecture table, lowest first. Every import statement of every module
counts, the ones inside functions too, so a lazy import cannot hide a cycle.
"""

from __future__ import annotations

import ast
from pathlib import Path

import featpipe

PACKAGE = Path(featpipe.__file__).parent
STAGES = ["errors", "atomic", "project", "compiler", "sqlgen", "engines", "glm", "fitted", "fitting", "review", "api", "cli"]
FOUNDATIONS = {"errors", "atomic"}  # every stage may use these two modules


def stage_of(module: str) -> str | None:
    """'featpipe.sqlgen.score' -> 'sqlgen'; None for the package itself and its __main__."""
    parts = module.split(".")
    return parts[1] if len(parts) > 1 and parts[1] in STAGES else None


def rank(stage: str) -> int:
    return -1 if stage in FOUNDATIONS else STAGES.index(stage)


def module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def imported_modules(path: Path) -> list[tuple[int, str]]:
    """(line, absolute module name) of every featpipe module `path` imports."""
    name = module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                target = ".".join([*base, *([node.module] if node.module else [])])
            else:
                target = node.module or ""
            targets = [target] if node.module else [f"{target}.{alias.name}" for alias in node.names]
        elif isinstance(node, ast.Import):
            targets = [alias.name for alias in node.names]
        else:
            continue
        found += [(node.lineno, target) for target in targets if target.split(".")[0] == "featpipe"]
    return found


def test_no_stage_imports_a_stage_above_it():
    wrong = []
    for path in sorted(PACKAGE.rglob("*.py")):
        here = stage_of(module_name(path))
        if here is None:
            continue
        for line, target in imported_modules(path):
            there = stage_of(target)
            if there is not None and there != here and rank(there) > rank(here):
                wrong.append(f"{path.relative_to(PACKAGE.parent)}:{line}: {here} imports {target}, a later stage")
    assert wrong == []


def test_every_module_belongs_to_a_stage_named_in_the_developer_guide():
    guide = (PACKAGE.parent / "DEVELOPERS.md").read_text(encoding="utf-8")
    loose = sorted(
        path.relative_to(PACKAGE).as_posix()
        for path in PACKAGE.rglob("*.py")
        if stage_of(module_name(path)) is None and path.name not in ("__init__.py", "__main__.py")
    )
    assert loose == []
    missing = [stage for stage in STAGES if f"`{stage}" not in guide]
    assert missing == []


def test_the_public_names_stay_the_api_once_every_stage_is_loaded():
    """A stage folder named like an API function would replace `featpipe.<name>` when it is imported."""
    import importlib
    import inspect
    import pkgutil

    for module in pkgutil.walk_packages([str(PACKAGE)], prefix="featpipe."):
        if not module.name.endswith("__main__"):
            importlib.import_module(module.name)
    modules = [name for name in featpipe.__all__ if inspect.ismodule(getattr(featpipe, name))]
    assert modules == []
