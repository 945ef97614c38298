"""A column's training profile from its values in memory, sorted by numpy.

The same figures as the SQL routes of featpipe.sqlgen.profile (whose `summarize` forms the
`Profile`): the order statistics are the sorted values at the needed ranks, the rows at or below an
edge a binary search, the moments sums over the values shifted by the median.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pyarrow as pa

from ..fitted import Profile
from ..glm.sources import numpy_values
from ..sqlgen.profile import RankedValues, needed_ranks, summarize


def present_values(chunks: Sequence[pa.Array], spare: np.ndarray | None = None) -> tuple[np.ndarray, int]:
    """A column that arrived as Arrow `chunks` (DOUBLE) as a writable array of its non-NULL values, and its
    NULL count. The values are copied into `spare` when it is large enough: memory a column before
    held, so the copy touches no fresh pages (a fresh 10M-row array costs about as much in page faults
    as the copy itself)."""
    present = [numpy_values(chunk.drop_null()) for chunk in chunks]
    rows = sum(len(values) for values in present)
    values = spare[:rows] if spare is not None and len(spare) >= rows else np.empty(rows)
    if present:
        np.concatenate(present, out=values)
    return values, sum(chunk.null_count for chunk in chunks)


def sorted_profile(values: np.ndarray, nulls: int) -> Profile:
    """The `Profile` of a column's non-NULL `values` (a fresh array, sorted then shifted in place) and NULL count."""
    values.sort()
    n = len(values)
    if n == 0:
        return summarize(0, nulls, None, None, None, None, None, RankedValues(0, {}, {}))
    ranked = RankedValues(n, {rank: float(values[rank - 1]) for rank in needed_ranks(n)}, {})
    at_or_below = {edge: int(np.searchsorted(values, edge, side="right")) for edge in ranked.edges()}
    total, low, high = float(values.sum()), float(values[0]), float(values[-1])
    shifted = np.subtract(values, ranked.median(), out=values)
    return summarize(n, nulls, total, float(shifted.sum()), float(shifted @ shifted), low, high,
                     RankedValues(n, ranked.by_rank, at_or_below))
