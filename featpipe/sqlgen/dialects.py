"""The sqlglot dialects featpipe renders SQL for.

A module of its own, without sqlglot, so that the command line's help can list them for free.
"""

DIALECTS = ("duckdb", "postgres", "spark", "snowflake", "bigquery", "sqlite")
