"""An engine wrapper for tests that check which SQL a step sends."""

from __future__ import annotations

import contextlib


class Recording:
    """An engine that remembers the SQL it was asked to run (everything else is the engine's own); the SQL
    sent on its second connection (`beside`) is remembered apart, in `beside_queries`."""

    def __init__(self, engine, queries: list | None = None):
        self.engine, self.queries, self.beside_queries = engine, [] if queries is None else queries, []

    def __getattr__(self, name):
        return getattr(self.engine, name)

    def fetch(self, query):
        self.queries.append(self.engine.render(query))
        return self.engine.fetch(query)

    def fetch_batches(self, query, batch_rows):
        self.queries.append(self.engine.render(query))
        return self.engine.fetch_batches(query, batch_rows)

    @contextlib.contextmanager
    def beside(self):
        with self.engine.beside() as twin:
            if twin is None:
                yield None
                return
            yield Recording(twin, self.beside_queries)
