"""Names with a fixed meaning: the rule every name follows, and the names featpipe itself gives.

A term, input, column or model name must start with a letter and hold only letters, digits and `_`;
featpipe's own columns in a design table start with `_`, so they can never clash with a term.

The scoring and drift queries write columns of their own next to the key and the term names, so a
term (`reserved_reason`) or key column (`scoring_clash`) may not take those names; they are compared
without case, as DuckDB and Spark ignore the case of quoted identifiers.
"""

from __future__ import annotations

import re

from sqlglot import exp

from ..errors import FeatpipeError

NAME_PATTERN = re.compile(r"^[A-Za-z][A-Za-z0-9_]*\Z")  # \Z, not $: "$" also matches before a final newline
NAME_RULE = "must start with a letter and hold only letters, digits and _"

INTERCEPT = "(intercept)"

HOLDOUT_COLUMN = "_holdout"
OFFSET_COLUMN = "_offset"
WEIGHT_COLUMN = "_weight"
CLUSTER_COLUMN = "_cluster"  # the cluster of a row, with errors: {cluster: c}


def table_reference(text: str, option: str) -> exp.Table:
    """The table `name` or `schema.name` given in `option` as quoted identifiers; the text is never parsed as SQL.

    A table name from a command line or a file ends up in exported SQL, so anything but plain names
    (a function call, a quote, a statement) is refused here rather than escaped.

    >>> table_reference("scores.june", "--into").sql(identify=True)
    '"scores"."june"'
    >>> table_reference("read_csv('/etc/passwd')", "--table")
    Traceback (most recent call last):
    featpipe.errors.FeatpipeError: --table "read_csv('/etc/passwd')" is not a table name: give name or schema.name, each part must start with a letter and hold only letters, digits and _
    """
    parts = text.split(".") if isinstance(text, str) else []
    if not 1 <= len(parts) <= 2 or not all(NAME_PATTERN.match(part) for part in parts):
        raise FeatpipeError(f"{option} {text!r} is not a table name: give name or schema.name, each part {NAME_RULE}")
    *schema, name = parts
    return exp.table_(exp.to_identifier(name, quoted=True), db=exp.to_identifier(schema[0], quoted=True) if schema else None)


def design_table_name(model: str) -> str:
    return f"design_{model}"


# Columns the scoring query writes (featpipe.sqlgen.score), besides the key.
PREDICTION, LINEAR_PREDICTOR, OFFSET, STATUS = "prediction", "linear_predictor", "offset", "status"
CONTRIBUTION_PREFIX, REASON_PREFIX = "contribution_", "reason_"

# Columns the drift query writes (featpipe.sqlgen.drift): `rows`, then `<name>__<what>` per term and score.
ROWS = "rows"  # also the row count of featpipe's other aggregate queries (holdout metrics, report)
DRIFT_SEPARATOR = "__"
NULL_BIN = "null"  # the index of the NULL bin, after the numbered training bins


def contribution_column(term: str) -> str:
    return f"{CONTRIBUTION_PREFIX}{term}"


def reason_column(rank: int | str) -> str:
    return f"{REASON_PREFIX}{rank}"


def bin_column(name: str, index: int | str) -> str:
    """Rows of the batch in bin `index` (1-based) of `name`; `NULL_BIN` names the NULL bin."""
    return _drift_column(name, "nulls" if index == NULL_BIN else f"bin_{index}")


def share_column(name: str, index: int | str) -> str:
    return _drift_column(name, f"share_{index}")


def below_column(name: str) -> str:
    return _drift_column(name, "below_min")


def above_column(name: str) -> str:
    return _drift_column(name, "above_max")


def mean_column(name: str) -> str:
    return _drift_column(name, "mean")


def mean_contribution_column(name: str) -> str:
    return _drift_column(name, "mean_contribution")


def psi_column(name: str) -> str:
    return _drift_column(name, "psi")


def unseen_column(name: str) -> str:
    """Rows of the batch whose text column `name` holds a level never seen in training."""
    return _drift_column(name, "unseen")


def _drift_column(name: str, what: str) -> str:
    return f"{name}{DRIFT_SEPARATOR}{what}"


def scoring_clash(name: str) -> str | None:
    """Why `name` would collide with a column the scoring query writes, or None when it cannot.

    >>> scoring_clash("Status")
    'is a column the scoring query writes'
    >>> scoring_clash("reason_code") is None
    True
    """
    lowered = name.lower()
    if lowered in (PREDICTION, LINEAR_PREDICTOR, OFFSET, STATUS):
        return "is a column the scoring query writes"
    if lowered.startswith(CONTRIBUTION_PREFIX):
        return f"has the form of the scoring query's {contribution_column('<term>')} columns"
    if re.fullmatch(f"{REASON_PREFIX}[0-9]+", lowered):
        return f"has the form of the scoring query's {reason_column('<k>')} columns"
    return None


def reserved_reason(name: str) -> str | None:
    """Why `name` cannot name a term (it would collide with a scoring or drift output column), or None.

    >>> reserved_reason("payment__ratio")
    "holds '__', which the drift query's <name>__<what> columns use"
    """
    if name.lower() == ROWS:
        return "is a column the drift query writes"
    if DRIFT_SEPARATOR in name:
        return f"holds '{DRIFT_SEPARATOR}', which the drift query's {_drift_column('<name>', '<what>')} columns use"
    return scoring_clash(name)
