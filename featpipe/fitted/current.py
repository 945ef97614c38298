"""Refuse to use a fitted file whose model changed since its fit, unless the user allows it.

Scoring, drift and the report read the fitted file alone, so a stale file still works; it just no
longer describes the definitions under review. They all ask `refuse_if_stale` first, so the refusal
reads the same everywhere and always names the two ways out.
"""

from __future__ import annotations

from ..compiler import compile_project
from ..errors import FeatpipeError
from ..project import Project
from .file import FittedModel, staleness

UNCHECKED = ("the project does not pass `featpipe check` now, so whether this fit still matches its "
             "definitions is unknown")


def refuse_if_stale(project: Project, fitted: FittedModel, *, allow_stale: bool = False) -> tuple[str, ...]:
    """Why `fitted` no longer matches the project's definitions (empty when current).

    A stale model raises one FeatpipeError naming the file, the reasons and the ways out, unless
    `allow_stale`; then the reasons are returned for the caller to show. A project that does not pass
    `featpipe check` raises its own errors, or with `allow_stale` is one reason more.
    """
    try:
        models = compile_project(project).models
    except FeatpipeError:
        if not allow_stale:
            raise
        return (UNCHECKED,)
    reasons = tuple(staleness(fitted, models.get(fitted.model), project.inputs))
    if reasons and not allow_stale:
        raise FeatpipeError(
            f"fitted/{fitted.model}.yaml is stale: {'; '.join(reasons)}; run `featpipe fit -p {project.root} "
            f"{fitted.model}` or pass --allow-stale to use the fitted definitions anyway"
        )
    return reasons
