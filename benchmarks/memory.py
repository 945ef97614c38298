"""Peak memory of a benchmark's child process, measured in the child itself."""

from __future__ import annotations

import resource
from pathlib import Path


def peak_rss_mb() -> float:
    """Peak resident memory of this process since it started.

    Linux's VmHWM belongs to the process image, while getrusage's ru_maxrss also keeps the peak of
    the parent it was started from (here the benchmark driver that wrote the data or fitted a model).
    """
    status = Path("/proc/self/status")
    if status.exists():
        for line in status.read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kilobytes on Linux
