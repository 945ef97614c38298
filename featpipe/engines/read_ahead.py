"""Reading from an engine while the caller works on what was read."""

from __future__ import annotations

from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

Item = TypeVar("Item")


def read_ahead(items: Iterator[Item]) -> Iterator[Item]:
    """Yield from `items`, fetching the next item in a helper thread meanwhile (one item ahead).

    Worth it where reading and the work both release the GIL (DuckDB and numpy); other drivers may be
    tied to the thread that opened them, so only DuckDB reads are put ahead.
    """
    with ThreadPoolExecutor(max_workers=1) as pool:
        pending = pool.submit(next, items, None)
        while (item := pending.result()) is not None:
            pending = pool.submit(next, items, None)
            yield item
