"""Names with a fixed meaning: the rule every name follows, and the names featpipe itself gives.

A term, input, column or model name must start with a letter and hold only letters, digits and `_`;
featpipe's own columns in a design table start with `_`, so they can never clash with a term.
"""

from __future__ import annotations

import re

NAME_PATTERN = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")

INTERCEPT = "(intercept)"

HOLDOUT_COLUMN = "_holdout"
OFFSET_COLUMN = "_offset"
WEIGHT_COLUMN = "_weight"


def design_table_name(model: str) -> str:
    return f"design_{model}"
