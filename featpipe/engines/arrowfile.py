"""Read a CSV or Parquet file as Arrow record batches, for engines that cannot read local files in SQL.

PostgreSQL (COPY FROM STDIN) and SQLite (INSERT) are fed from these batches, so a large file never sits
in memory whole. CSV column types are inferred by pyarrow from the first block (64 MiB); a later value
that does not fit is an error naming the file, not a silently wrong table.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
from sqlglot import exp

from ..errors import EngineError
from .datafiles import check_data_file

CSV_BLOCK_BYTES = 64 << 20


@dataclass
class ArrowFile:
    """An open data file: its Arrow schema (dictionaries decoded) and a one-pass batch stream."""

    path: Path
    schema: pa.Schema
    batches: Iterator[pa.RecordBatch]


def open_arrow_file(path: Path, engine: str, batch_rows: int = 65_536) -> ArrowFile:
    """Open `path` (.parquet, else CSV with a header row); problems are EngineErrors naming `engine` and the file."""
    path = Path(path)
    check_data_file(path, engine)
    try:
        if path.suffix.lower() == ".parquet":
            parquet = pq.ParquetFile(path)
            raw_schema = parquet.schema_arrow
            raw = parquet.iter_batches(batch_size=batch_rows)
        else:
            reader = pacsv.open_csv(path, read_options=pacsv.ReadOptions(block_size=CSV_BLOCK_BYTES))
            raw_schema = reader.schema
            raw = iter(reader)
    except (pa.ArrowException, OSError) as error:
        raise EngineError(f"{engine}: cannot read {path}: {_first_line(error)}") from error
    schema = pa.schema([pa.field(f.name, _plain_type(f.type)) for f in raw_schema])
    return ArrowFile(path, schema, _decoded(raw, schema, path, engine))


def sql_type(arrow_type: pa.DataType) -> exp.DataType:
    """The SQL column type a loaded Arrow column gets (rendered per dialect by sqlglot)."""
    if pa.types.is_boolean(arrow_type):
        return exp.DataType.build("BOOLEAN")
    if pa.types.is_integer(arrow_type):
        if arrow_type.bit_width <= 16 and pa.types.is_signed_integer(arrow_type):
            return exp.DataType.build("SMALLINT")
        if arrow_type == pa.int32() or arrow_type in (pa.uint8(), pa.uint16()):
            return exp.DataType.build("INT")
        if arrow_type == pa.uint64():
            return exp.DataType.build("DECIMAL(20, 0)")
        return exp.DataType.build("BIGINT")
    if pa.types.is_floating(arrow_type):
        return exp.DataType.build("DOUBLE")
    if pa.types.is_decimal(arrow_type):
        return exp.DataType.build(f"DECIMAL({arrow_type.precision}, {arrow_type.scale})")
    if pa.types.is_date(arrow_type):
        return exp.DataType.build("DATE")
    if pa.types.is_timestamp(arrow_type):
        return exp.DataType.build("TIMESTAMPTZ" if arrow_type.tz else "TIMESTAMP")
    if pa.types.is_binary(arrow_type) or pa.types.is_large_binary(arrow_type):
        return exp.DataType.build("VARBINARY")
    return exp.DataType.build("TEXT")  # strings, all-empty columns, and anything else as text


def _plain_type(arrow_type: pa.DataType) -> pa.DataType:
    return arrow_type.value_type if pa.types.is_dictionary(arrow_type) else arrow_type


def _decoded(raw, schema: pa.Schema, path: Path, engine: str) -> Iterator[pa.RecordBatch]:
    try:
        for batch in raw:
            if batch.schema != schema:
                columns = [c.dictionary_decode() if pa.types.is_dictionary(c.type) else c for c in batch.columns]
                batch = pa.record_batch(columns, schema=schema)
            yield batch
    except (pa.ArrowException, OSError) as error:
        raise EngineError(f"{engine}: cannot read {path}: {_first_line(error)}") from error


def _first_line(error: BaseException) -> str:
    text = str(error).strip()
    return text.splitlines()[0] if text else type(error).__name__
