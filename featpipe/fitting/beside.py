"""Queries a fit needs that do not wait for its coefficients, run on a second connection while it fits.

The training profiles of a fit's terms and the input's health are queries of their own (on PostgreSQL
three scans and one more per text column, on Spark a quantile summary and counting scans), as is the
linear predictor's profile once the coefficients are known, beside the holdout metrics. `beside(engine)`
yields a function that hands such work to one thread with the engine's second connection
(`Engine.beside`), in the order given, and returns a function that waits for its result.

On PostgreSQL a fit reads the training rows once into a local copy and runs IRLS on it in this process,
leaving the server idle: a 1M-row lease fit took 11.9-13.3 s this way against 15.1-20.5 s in turn. A
Spark session runs jobs sent from two threads side by side, filling the time each job spends planning
and compiling: 75.8-81.1 s against 86.8-94.5 s (benchmarks/bench_engines.py, interleaved runs). DuckDB
works in this process, on the cores the fit keeps busy: it has no second connection, and the work is
done at once on the caller's connection, as before.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from typing import Any

from ..engines.base import Engine

Work = Callable[..., Any]  # a function of an engine and arguments
Started = Callable[..., Callable[[], Any]]  # starts Work(engine, *arguments); the result waits for its value


@contextlib.contextmanager
def beside(engine: Engine) -> Iterator[Started]:
    """Start work on `engine`'s second connection; leaving waits for the work still running, but after a
    failure of the caller's (a refused fit) work not yet begun is dropped."""
    with engine.beside() as twin:
        if twin is None:
            yield _at_once(engine)
            return
        with ThreadPoolExecutor(max_workers=1) as pool:
            try:
                yield lambda work, *arguments: pool.submit(work, twin, *arguments).result
            except BaseException:
                pool.shutdown(cancel_futures=True)
                raise


def _at_once(engine: Engine) -> Started:
    def start(work: Work, *arguments) -> Callable[[], Any]:
        value = work(engine, *arguments)
        return lambda: value

    return start
