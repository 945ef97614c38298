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
from ..sqlgen.profile import RankedValues, needed_ranks, summarize


def sorted_profile(chunks: Sequence[pa.Array]) -> Profile:
    """The `Profile` of a column that arrived as Arrow `chunks` (DOUBLE, NULLs counted apart)."""
    nulls = sum(chunk.null_count for chunk in chunks)
    present = [chunk.drop_null().to_numpy(zero_copy_only=False) for chunk in chunks]
    values = np.concatenate(present) if present else np.empty(0)  # a fresh array, sorted in place
    values.sort()
    n = len(values)
    if n == 0:
        return summarize(0, nulls, None, None, None, None, None, RankedValues(0, {}, {}))
    ranked = RankedValues(n, {rank: float(values[rank - 1]) for rank in needed_ranks(n)}, {})
    at_or_below = {edge: int(np.searchsorted(values, edge, side="right")) for edge in ranked.edges()}
    median = ranked.median()
    shifted = values - median
    return summarize(n, nulls, float(values.sum()), float(shifted.sum()), float(shifted @ shifted), float(values[0]),
                     float(values[-1]), RankedValues(n, ranked.by_rank, at_or_below))
