"""Engine adapters; `open_engine` picks one from the project's engine block."""

from __future__ import annotations

from ..project import EngineConfig
from .base import Engine


def open_engine(config: EngineConfig) -> Engine:
    if config.kind == "duckdb":
        from .duckdb import DuckDBEngine

        return DuckDBEngine(config.path)
    if config.kind == "postgres":
        from .postgres import PostgresEngine

        return PostgresEngine(config)
    if config.kind == "spark":
        from .spark import SparkEngine

        return SparkEngine(config)
    raise ValueError(f"unknown engine kind {config.kind}")
