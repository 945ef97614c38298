"""What a benchmark's figures were measured on, printed in its first lines.

A figure quoted later (in an issue, the README) is only comparable with the package versions, the
machine's core count and how busy the machine was. Standard library only: bench_engines' driver
imports nothing else, so that the peak memory its children measure stays their own.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Iterable
from importlib.metadata import PackageNotFoundError, version


def package_version(name: str) -> str:
    try:
        return version(name)
    except PackageNotFoundError:
        return "not installed"


def machine_context(packages: Iterable[str]) -> str:
    """Two lines: Python and the packages' versions; the core count and the load average (1, 5, 15 minutes)."""
    versions = ", ".join(f"{name} {package_version(name)}" for name in packages)
    loads = " ".join(f"{load:.2f}" for load in os.getloadavg())
    return f"Python {sys.version.split()[0]}; {versions}\n{os.cpu_count()} cores; load average {loads}"
