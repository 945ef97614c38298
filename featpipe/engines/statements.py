"""The few DDL trees every adapter needs, built with sqlglot so no adapter pastes SQL text."""

from __future__ import annotations

from sqlglot import exp

BUILDING_SUFFIX = "__featpipe_building"


def building_name(name: str) -> str:
    """The temporary name a table is built under before it is swapped in."""
    return f"{name}{BUILDING_SUFFIX}"


def create_table_as(name: str, query: exp.Query, kind: str = "TABLE", temporary: bool = False) -> exp.Create:
    """CREATE [TEMPORARY] TABLE (or, with `kind` "VIEW", CREATE VIEW) `name` AS `query`."""
    properties = exp.Properties(expressions=[exp.TemporaryProperty()]) if temporary else None
    return exp.Create(this=exp.to_table(name), kind=kind, expression=query, properties=properties)


def drop_table(name: str, kind: str = "TABLE") -> exp.Drop:
    return exp.Drop(tables=[exp.to_table(name)], kind=kind, exists=True)


def rename_table(old: str, new: str, kind: str = "TABLE") -> exp.Alter:
    statement = exp.rename_table(old, new)
    statement.set("kind", kind)
    return statement


def select_all(name: str, limit: int | None = None) -> exp.Select:
    query = exp.select(exp.Star()).from_(exp.to_table(name))
    return query.limit(limit) if limit is not None else query
