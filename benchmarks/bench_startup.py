"""Start-up time of `featpipe check` against importing the libraries it cannot do without.

    python benchmarks/bench_startup.py
    python benchmarks/bench_startup.py --repeat 30 --project projects/fleet_claims

`featpipe check -p PROJECT` runs as a user runs it: the console script installed next to this Python,
in a new process. The floor is `python -c "import duckdb, sqlglot, yaml"`, the libraries a featpipe
command cannot do without. `featpipe --help` is timed too. The commands run interleaved (the order
rotates every round), so a busy spell on a shared machine slows all of them; medians and minimums of
wall-clock seconds are printed with their ratios to the floor. Target: check at most 1.5x the floor.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

from context import machine_context

REPO = Path(__file__).resolve().parent.parent
PACKAGES = ("featpipe", "typer", "rich", "pydantic", "sqlglot", "duckdb", "pyyaml")


def console_script() -> str:
    """The `featpipe` entry point of this Python (a shell shim in front of it would be timed too)."""
    script = Path(sys.executable).with_name("featpipe")
    if not script.is_file():
        raise SystemExit(f"no featpipe console script next to {sys.executable}; install featpipe in this Python")
    return str(script)


def seconds(command: list[str]) -> float:
    started = time.perf_counter()
    done = subprocess.run(command, cwd=REPO, capture_output=True, text=True, check=False)
    elapsed = time.perf_counter() - started
    if done.returncode != 0:
        raise SystemExit(f"{' '.join(command)} exited with {done.returncode}:\n{done.stderr}")
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=20, help="interleaved runs of each command")
    parser.add_argument("--project", default="projects/lease_default", help="project to check (relative to the repository)")
    arguments = parser.parse_args()

    print(machine_context(PACKAGES), flush=True)
    featpipe = console_script()
    commands = {
        "import duckdb, sqlglot, yaml": [sys.executable, "-c", "import duckdb, sqlglot, yaml"],
        f"featpipe check -p {arguments.project}": [featpipe, "check", "-p", arguments.project],
        "featpipe --help": [featpipe, "--help"],
    }
    for command in commands.values():  # warm the file cache; not counted
        seconds(command)
    runs: dict[str, list[float]] = {label: [] for label in commands}
    labels = list(commands)
    for round_ in range(arguments.repeat):
        shift = round_ % len(labels)
        for label in labels[shift:] + labels[:shift]:
            runs[label].append(seconds(commands[label]))

    floor = labels[0]
    floor_median, floor_min = statistics.median(runs[floor]), min(runs[floor])
    print(f"{arguments.repeat} interleaved runs each; load average at the end {os.getloadavg()[0]:.2f}\n")
    print(f"{'command':<44}{'median s':>10}{'min s':>8}{'median / floor':>16}{'min / floor':>13}")
    for label, times in runs.items():
        median, fastest = statistics.median(times), min(times)
        print(f"{label:<44}{median:>10.3f}{fastest:>8.3f}{median / floor_median:>16.2f}{fastest / floor_min:>13.2f}")
    check = f"featpipe check -p {arguments.project}"
    ratio = statistics.median(runs[check]) / floor_median
    print(f"\ncheck / floor (medians): {ratio:.2f}x; target at most 1.5x: {'met' if ratio <= 1.5 else 'NOT met'}")


if __name__ == "__main__":
    main()
