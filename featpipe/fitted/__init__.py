"""The fitted file and what reads only it: scoring, drift, explain, the report."""

from ..project.names import INTERCEPT
from .file import (
    Effect,
    FittedModel,
    FittedTerm,
    Profile,
    as_written,
    file_hash,
    from_yaml,
    read_fitted,
    stale_fits,
    staleness,
    write_fitted,
)

__all__ = [
    "INTERCEPT", "Effect", "FittedModel", "FittedTerm", "Profile", "as_written", "file_hash", "from_yaml",
    "read_fitted", "stale_fits", "staleness", "write_fitted",
]
