"""An engine wrapper for tests that check which SQL a step sends."""

from __future__ import annotations


class Recording:
    """An engine that remembers the SQL it was asked to run (everything else is the engine's own)."""

    def __init__(self, engine):
        self.engine, self.queries = engine, []

    def __getattr__(self, name):
        return getattr(self.engine, name)

    def fetch(self, query):
        self.queries.append(self.engine.render(query))
        return self.engine.fetch(query)

    def fetch_batches(self, query, batch_rows):
        self.queries.append(self.engine.render(query))
        return self.engine.fetch_batches(query, batch_rows)
