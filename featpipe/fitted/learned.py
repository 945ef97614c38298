"""Learned terms as a fitted file records them: their columns checked against their constants, and
what moved between two fits.

A learned term's `learned` record holds its constants (levels with their rows, or edges, knots or
caps) and one entry per design column. The columns follow from the constants by the rule that
made them (featpipe.sqlgen.learned), so a hand edit that adds or drops a column, or a level, is
refused with the file and line instead of failing later on an index:

    >>> expected_labels({"function": "BINS", "arguments": [3], "values": [1.0, 2.5]})
    ('bin 2', 'bin 3')
    >>> constants_changes({"function": "BINS", "arguments": [3], "values": [1.0, 2.5]},
    ...                   {"function": "BINS", "arguments": [3], "values": [1.0, 3.0]})
    ['edges moved: 1, 2.5 -> 1, 3']
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import yaml

from ..compiler.learned import LearnedCall
from ..engines.builds import input_signature
from ..errors import FeatpipeError
from ..sqlgen.drift import Category, Monitored
from ..sqlgen.learned import OTHER, LearnedConstants, read_levels
from ..sqlgen.score import learned_value_column

# What a BINS, SPLINE or CAPPED term's `values` are, as a reviewer names them.
VALUES_NAMED = {"BINS": "edges", "SPLINE": "knots", "CAPPED": "caps"}
if TYPE_CHECKING:
    from .file import FittedTerm

UNSEEN = "unseen"  # drift's bin of the levels a LEVELS term never saw in training


def constants_of(learned: dict) -> LearnedConstants:
    """The constants a `learned` record holds, its column labels recomputed from them."""
    call = LearnedCall(learned["function"], tuple(learned["arguments"]))
    if call.function == "LEVELS":
        return read_levels(call, [(item["level"], item["rows"]) for item in learned.get("levels") or ()])
    return LearnedConstants(call, values=tuple(learned.get("values") or ()))


def expected_labels(learned: dict) -> tuple[str, ...]:
    """The labels of the columns the record's constants give, in order."""
    return constants_of(learned).labels


def check_learned_columns(data: dict, text: str, source: str) -> None:
    """Refuse a learned term whose column entries do not match its constants, naming file and line.

    `data` is a fitted file that passed `check_values`; `text` its YAML (read again for the line only
    when something is wrong).
    """
    for index, term in enumerate(data["terms"]):
        learned = term.get("learned")
        if not learned:
            continue
        function = learned["function"]
        missing = [key for key in (("levels", "reference", "pooled") if function == "LEVELS" else ("values",))
                   if key not in learned]
        if missing:
            raise FeatpipeError(f"{source}:{_line(text, index, 'learned')}: term {term['name']} ({function}) has no "
                                f"learned.{missing[0]}; the file was edited by hand; run featpipe fit")
        expected = expected_labels(learned)
        found = tuple(item["label"] for item in learned["columns"])
        problem = None
        if function == "CAPPED" and len(learned["values"]) != 2:
            problem = f"lists {len(learned['values'])} caps, not 2 (low and high)"
        elif function == "LEVELS" and learned["reference"] != constants_of(learned).reference:
            problem = f"names {learned['reference']!r} as reference, but the most frequent level is {constants_of(learned).reference!r}"
        elif len(found) != len(expected):
            problem = (f"lists {len(found)} column entries, but its {_what(learned)} give {len(expected)} "
                       f"({', '.join(expected)})")
        elif found != expected:
            problem = f"lists columns {', '.join(found)}, but its {_what(learned)} give {', '.join(expected)}"
        if problem:
            raise FeatpipeError(f"{source}:{_line(text, index, 'columns')}: term {term['name']} ({function}) {problem}; "
                                "the file was edited by hand; run featpipe fit")


def _what(learned: dict) -> str:
    if learned["function"] == "LEVELS":
        return f"{len(learned['levels'])} levels (at least {learned['arguments'][0]} rows for a column of their own)"
    return f"{len(learned['values'])} {VALUES_NAMED[learned['function']]}"


def _line(text: str, index: int, key: str) -> int:
    """The line of the key terms[index].learned (key 'learned') or terms[index].learned.KEY in the YAML
    text (1 when it cannot be found)."""
    try:
        node = yaml.compose(text, Loader=getattr(yaml, "CSafeLoader", yaml.SafeLoader))
        term = _entry(node, "terms")[1].value[index]
        learned_key, learned = _entry(term, "learned")
        found = learned_key if key == "learned" else _entry(learned, key)[0]
        return found.start_mark.line + 1
    except (AttributeError, IndexError, KeyError, TypeError, yaml.YAMLError):
        return 1


def _entry(node, key: str):
    """(key node, value node) of `key` in a composed mapping node."""
    for key_node, value in node.value:
        if key_node.value == key:
            return key_node, value
    raise KeyError(key)


def learned_monitored(term: FittedTerm, train_rows: int | None) -> Monitored:
    """How drift watches a learned term, from the scoring query's columns (featpipe.sqlgen.drift.Monitored):
    CAPPED as its one column, BINS and SPLINE by their argument's training deciles, LEVELS by its levels
    (each with a column, the reference, then the pooled ones as `other`) against their training rows.
    The contribution is the sum over the term's columns."""
    learned = term.learned
    names = [f"_{term.name}__{index}" for index in range(1, len(learned["columns"]) + 1)]  # as scoring names them
    if learned["function"] == "CAPPED":
        return Monitored(term.name, term.profile, term.estimate, value=names[0])
    parts = tuple((name, item["estimate"], item["mean"]) for name, item in zip(names, learned["columns"], strict=True))
    value = learned_value_column(term.name)
    if learned["function"] != "LEVELS":
        return Monitored(term.name, term.profile, value=value, parts=parts)
    constants = constants_of(learned)
    rows = dict(constants.levels)
    total = train_rows or sum(rows.values())
    named = [level for level, _ in constants.levels if level not in constants.pooled]
    categories = [Category(level, (level,), rows[level] / total) for level in named]
    if constants.pooled:
        categories.append(Category(OTHER, constants.pooled, sum(rows[level] for level in constants.pooled) / total))
    return Monitored(term.name, None, value=value, parts=parts, categories=tuple(categories),
                     null_share=max(total - sum(rows.values()), 0) / total)


def data_staleness(fitted, inputs) -> list[str]:
    """A model's learned constants would change when the rows they were learned from changed. Cheaply
    seen for an input with a `load:` file: the file's signature (engines.builds, the one `refresh` uses
    to rebuild design tables) is recorded with each learned term and compared with the file's now. A
    table the engine holds without a file has the signature 'table' and is never seen to change."""
    learned = [term for term in fitted.model_terms if term.learned and term.learned.get("data")]
    source = inputs.get(fitted.input)
    if not learned or source is None or source.load is None or not source.load.is_file():
        return []
    now = input_signature(source)
    moved = [term.name for term in learned if term.learned["data"] != now]
    if not moved:
        return []
    return [f"the data of input '{fitted.input}' changed since the fit, so the learned constants of "
            f"{', '.join(moved)} would be learned again"]


def constants_changes(old: dict | None, new: dict | None) -> list[str]:
    """What moved between two `learned` records of one term, in words (empty when nothing did)."""
    if old is None or new is None:
        return [] if old is new else ["became a learned term" if old is None else "is no longer a learned term"]
    if (old["function"], old["arguments"]) != (new["function"], new["arguments"]):
        return [f"{old['function']}{tuple(old['arguments'])} became {new['function']}{tuple(new['arguments'])}"]
    if new["function"] == "LEVELS":
        was, now = constants_of(old), constants_of(new)
        levels_was, levels_now = dict(was.levels), dict(now.levels)
        moved = [f"levels added: {', '.join(sorted(set(levels_now) - set(levels_was)))}"] \
            if set(levels_now) - set(levels_was) else []
        moved += [f"levels dropped: {', '.join(sorted(set(levels_was) - set(levels_now)))}"] \
            if set(levels_was) - set(levels_now) else []
        if was.reference != now.reference:
            moved.append(f"reference level {was.reference} -> {now.reference}")
        if was.columns != now.columns:
            moved.append(f"columns {', '.join(was.columns)} -> {', '.join(now.columns)}")
        return moved
    named = VALUES_NAMED[new["function"]]
    if old["values"] == new["values"]:
        return []
    return [f"{named} moved: {', '.join(f'{v:.15g}' for v in old['values'])} -> "
            f"{', '.join(f'{v:.15g}' for v in new['values'])}"]
