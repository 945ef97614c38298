"""Engine wrappers for tests that check which SQL a step sends."""

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


class MissedSummary(Recording):
    """The engine, except that its quantile summary answers values above every row of the first column,
    so that column's brackets miss (Spark's error bound rules that out; the route must not rest on it)."""

    def fetch(self, query):
        rows = super().fetch(query)
        if "PERCENTILE_APPROX" not in self.queries[-1].upper():
            return rows
        ((first, *others),) = rows
        return [([value + 1000.0 for value in first], *others)]
