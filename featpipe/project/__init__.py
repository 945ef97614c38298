"""The project as files: featpipe.yaml, the specs under specs/ and the term files, read into frozen dataclasses."""

from .load import (
    ENGINE_KINDS,
    FAMILIES,
    PROJECT_FILE,
    EngineConfig,
    Holdout,
    InputSpec,
    ModelSpec,
    Penalty,
    Project,
    TermFile,
    find_project_root,
    load_project,
)
from .names import NAME_PATTERN

__all__ = [
    "ENGINE_KINDS", "FAMILIES", "NAME_PATTERN", "PROJECT_FILE", "EngineConfig", "Holdout", "InputSpec", "ModelSpec",
    "Penalty", "Project", "TermFile", "find_project_root", "load_project",
]
