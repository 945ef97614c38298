"""Group tables: a model's outcomes read across the values of each group column of its spec.

For models that decide about people: per group, the rows, the event rate (binomial; the mean
observed otherwise), the mean prediction, calibration in the large (observed over predicted, 1 when
calibrated), the AUC (Mann-Whitney, within the group) and the share flagged (predicted at or above the
threshold). `flagged_ratio` is each group's flagged share over the highest flagged share of any
readable group, `unflagged_ratio` the same for the share not flagged: the four-fifths rule of the US
Uniform Guidelines on Employee Selection Procedures (29 CFR 1607.4(D)) compares the rate of the
favourable outcome so, and a ratio below 0.8 is the common screen for a closer look. Which of the two
is the favourable outcome depends on what flagging means for the people scored. Groups under
MIN_GROUP_ROWS rows are too small to read: only their rows are given.

The sums come from one grouped query per column in the engine (featpipe.sqlgen.groups); only one row
per group comes back.
"""

from __future__ import annotations

from collections.abc import Sequence

from sqlglot import exp

from ..engines.base import Engine
from ..sqlgen.families import sums_family
from ..sqlgen.groups import group_query

MIN_GROUP_ROWS = 30  # fewer rows than this: the group's figures are too noisy to read (common practice)
FOUR_FIFTHS = 0.8  # 29 CFR 1607.4(D)


def group_tables(engine: Engine, rows: exp.Select, table: str, key: str, groups: Sequence[str], family: str,
                 threshold: float) -> dict[str, list[dict]]:
    """Per group column of `table`, the table of its groups over `rows` (KEY, OBSERVED, ETA scored rows)."""
    return {name: read_groups(engine.fetch(group_query(rows, table, key, name, family, threshold)), family)
            for name in groups}


def read_groups(found: Sequence[tuple], family: str) -> list[dict]:
    """The rows of a group query as the table's entries, ordered by group label (the NULL group last)."""
    binomial = sums_family(family) == "binomial"
    entries = []
    for label, count, observed, predicted, flagged, twice_rank_sum in sorted(found, key=lambda row: (row[0] is None, row[0] or "")):
        rows = int(count)
        if rows < MIN_GROUP_ROWS:
            entries.append({"group": label, "rows": rows, "too_small": True})
            continue
        observed, predicted = float(observed), float(predicted)
        entry = {"group": label, "rows": rows, "too_small": False, "mean_observed": observed / rows,
                 "mean_predicted": predicted / rows, "observed_to_predicted": observed / predicted if predicted else None}
        if binomial:
            events = round(observed)
            pairs = events * (rows - events)
            entry.update({"events": events, "flagged_share": int(flagged) / rows,
                          # Mann-Whitney: AUC = (R - n1 (n1 + 1) / 2) / (n1 n0), R the events' rank sum, 2R exact
                          "auc": (int(twice_rank_sum) - events * (events + 1)) / (2 * pairs) if pairs else None})
        entries.append(entry)
    if binomial:
        _with_ratios(entries)
    return entries


def _with_ratios(entries: list[dict]) -> None:
    """Each readable group's flagged and unflagged shares over the highest such share among readable groups."""
    readable = [entry for entry in entries if not entry["too_small"]]
    for ratio, share in (("flagged_ratio", lambda entry: entry["flagged_share"]),
                         ("unflagged_ratio", lambda entry: 1 - entry["flagged_share"])):
        highest = max((share(entry) for entry in readable), default=0.0)
        for entry in readable:
            entry[ratio] = share(entry) / highest if highest else None
