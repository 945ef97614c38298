"""User-facing problems: positioned diagnostics and the error that carries them to the CLI.

Everything a user can fix is a `FeatpipeError` (exit status 1, no traceback); anything else is a bug
(exit status 2).
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, order=True)
class Diagnostic:
    """One problem at a place in a project file, printed as ``file:line:col: message``."""

    file: str
    line: int
    col: int
    message: str
    severity: str = "error"  # "error" or "warning"

    def __str__(self) -> str:
        prefix = "" if self.severity == "error" else "warning: "
        return f"{self.file}:{self.line}:{self.col}: {prefix}{self.message}"

    def as_dict(self) -> dict:
        return {
            "file": self.file,
            "line": self.line,
            "col": self.col,
            "severity": self.severity,
            "message": self.message,
        }


class FeatpipeError(Exception):
    """A problem the user can fix; carries one message or a list of diagnostics."""

    def __init__(self, message: str | None = None, diagnostics: list[Diagnostic] | None = None):
        self.diagnostics = sorted(diagnostics or [])
        if message is None:
            message = "\n".join(str(d) for d in self.diagnostics)
        super().__init__(message)


class EngineError(FeatpipeError):
    """The engine refused or failed: one line naming the engine and what to check."""


def raise_if_errors(diagnostics: list[Diagnostic]) -> None:
    errors = [d for d in diagnostics if d.severity == "error"]
    if errors:
        raise FeatpipeError(diagnostics=errors)
