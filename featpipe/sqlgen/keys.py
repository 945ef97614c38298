"""The key check: is a table's declared key unique and never NULL? One aggregate query answers it.

Every output of featpipe carries the key through, so a repeated key would score one entity twice and
a NULL key could not be joined back. The query returns one row: the rows whose key is NULL, how many
keys appear more than once, and the smallest few of those keys as examples for the message:

    >>> from featpipe.sqlgen.common import render
    >>> print(render(key_check_query("leases", "lease_id", examples=1), "duckdb", pretty=False))
    SELECT COALESCE(SUM(CASE WHEN "_key" IS NULL THEN "_rows" END), 0) AS "null_rows", COUNT("_key") AS "repeated_keys", MIN(CASE WHEN "_example" = 1 THEN "_key" END) AS "example_1" FROM (SELECT "_key", "_rows", ROW_NUMBER() OVER (PARTITION BY "_key" IS NULL ORDER BY "_key") AS "_example" FROM (SELECT "lease_id" AS "_key", COUNT(*) AS "_rows" FROM "leases" GROUP BY "lease_id" HAVING COUNT(*) > 1 OR "lease_id" IS NULL) AS "counts") AS "ranked"
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlglot import exp

from .common import alias, column

EXAMPLES = 3
KEY, ROWS, EXAMPLE = "_key", "_rows", "_example"


@dataclass(frozen=True)
class KeyCheck:
    """What `key_check_query` found: NULL-key rows, repeated keys and the smallest repeated keys."""

    null_rows: int
    repeated_keys: int
    examples: tuple

    @classmethod
    def from_row(cls, row: tuple) -> KeyCheck:
        null_rows, repeated_keys, *examples = row
        return cls(
            int(null_rows),
            int(repeated_keys),
            tuple(value for value in examples if value is not None),
        )


def key_check_query(table: str, key: str, examples: int = EXAMPLES) -> exp.Select:
    """One row: NULL-key rows, keys appearing more than once, and the `examples` smallest of those keys.

    Only NULL and repeated keys leave the GROUP BY; the NULL group is numbered in a partition of its
    own, so engines that sort NULL first (Spark) give the same examples as those that sort it last.
    """
    counts = (
        exp.select(alias(column(key), KEY), alias(exp.Count(this=exp.Star()), ROWS))
        .from_(exp.to_table(table))
        .group_by(column(key))
        .having(exp.or_(exp.Count(this=exp.Star()) > 1, column(key).is_(exp.null())))
    )
    number = exp.Window(
        this=exp.RowNumber(),
        partition_by=[column(KEY).is_(exp.null())],
        order=exp.Order(expressions=[exp.Ordered(this=column(KEY))]),
    )
    ranked = exp.select(column(KEY), column(ROWS), alias(number, EXAMPLE)).from_(
        counts.subquery("counts")
    )
    null_rows = exp.func(
        "SUM", exp.Case().when(column(KEY).is_(exp.null()), column(ROWS))
    )
    return exp.select(
        alias(
            exp.Coalesce(this=null_rows, expressions=[exp.Literal.number(0)]),
            "null_rows",
        ),
        alias(exp.Count(this=column(KEY)), "repeated_keys"),
        *(
            alias(
                exp.func(
                    "MIN",
                    exp.Case().when(
                        column(EXAMPLE).eq(exp.Literal.number(n)), column(KEY)
                    ),
                ),
                f"example_{n}",
            )
            for n in range(1, examples + 1)
        ),
    ).from_(ranked.subquery("ranked"))
