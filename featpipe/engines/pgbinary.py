"""Read PostgreSQL's binary COPY output into Arrow record batches, with numpy doing the per-row work.

`COPY (query) TO STDOUT (FORMAT BINARY)` sends each row as a 16-bit field count, then per field a 32-bit
length (-1 for NULL) and the value in network byte order. When every column has a fixed width (numbers
and booleans), rows without NULLs all have the same size, so a run of them is one numpy structured view;
a row with a NULL breaks the run at that row (its length field reads -1) and is read on its own. Rows
before the first broken one are checked field by field, so a misaligned read is never taken for data.
Format: PostgreSQL documentation, "COPY", section "Binary Format".
"""

from __future__ import annotations

import struct
from collections.abc import Iterable, Iterator, Sequence

import numpy as np
import pyarrow as pa

SIGNATURE = b"PGCOPY\n\xff\r\n\x00"
HEADER_BYTES = len(SIGNATURE) + 8  # the signature, 32-bit flags, 32-bit length of the header extension
TRAILER = -1  # the field count that ends the data

# Values of fixed width as COPY BINARY sends them, by type OID (pg_type.dat): numpy dtype, Arrow type.
FIXED_TYPES: dict[int, tuple[str, pa.DataType]] = {
    16: ("?", pa.bool_()),  # bool
    20: (">i8", pa.int64()),  # int8
    21: (">i2", pa.int64()),  # int2
    23: (">i4", pa.int64()),  # int4
    700: (">f4", pa.float64()),  # float4
    701: (">f8", pa.float64()),  # float8
}


def fixed_width(type_oids: Sequence[int]) -> bool:
    """Whether binary COPY of columns of these types can be read here."""
    return bool(type_oids) and all(oid in FIXED_TYPES for oid in type_oids)


def binary_batches(chunks: Iterable[bytes], names: Sequence[str], type_oids: Sequence[int], batch_rows: int) -> Iterator[pa.RecordBatch]:
    """Record batches of at most `batch_rows` rows from the byte chunks of one binary COPY (any split)."""
    reader = _RowReader(names, type_oids)
    parts: list[bytes] = []
    size, header_done, pending = 0, False, _Pending(batch_rows)
    for chunk in chunks:
        parts.append(bytes(chunk))
        size += len(chunk)
        if size < batch_rows * reader.stride:
            continue
        buffer, header_done = _without_header(b"".join(parts), header_done)
        consumed = yield from pending.add(reader.read(buffer))
        parts, size = [buffer[consumed:]], len(buffer) - consumed
    buffer, header_done = _without_header(b"".join(parts), header_done)
    yield from pending.add(reader.read(buffer))
    yield from pending.rest()


def _without_header(buffer: bytes, header_done: bool) -> tuple[bytes, bool]:
    if header_done:
        return buffer, True
    if not buffer.startswith(SIGNATURE):
        raise ValueError("not PostgreSQL binary COPY data (no PGCOPY signature)")
    (extension,) = struct.unpack_from(">i", buffer, HEADER_BYTES - 4)
    return buffer[HEADER_BYTES + extension :], True


class _Pending:
    """Parsed rows waiting to be cut into batches of exactly `batch_rows` (the last one shorter)."""

    def __init__(self, batch_rows: int):
        self.batch_rows, self.batches, self.rows = batch_rows, [], 0

    def add(self, parsed: tuple[list[pa.RecordBatch], int]):
        """Keep the parsed batches, yield every full batch; return the bytes the parse consumed."""
        batches, consumed = parsed
        self.batches.extend(batch for batch in batches if batch.num_rows)
        self.rows += sum(batch.num_rows for batch in batches)
        if self.rows >= self.batch_rows:
            table = pa.Table.from_batches(self.batches).combine_chunks()
            full = self.rows // self.batch_rows * self.batch_rows
            yield from table.slice(0, full).to_batches(max_chunksize=self.batch_rows)
            self.batches, self.rows = table.slice(full).to_batches(), self.rows - full
        return consumed

    def rest(self) -> Iterator[pa.RecordBatch]:
        if self.rows:
            yield from pa.Table.from_batches(self.batches).combine_chunks().to_batches(max_chunksize=self.batch_rows)


class _RowReader:
    """Reads whole rows from a buffer that starts at a row boundary."""

    def __init__(self, names: Sequence[str], type_oids: Sequence[int]):
        self.schema = pa.schema([pa.field(name, FIXED_TYPES[oid][1]) for name, oid in zip(names, type_oids, strict=True)])
        self.formats = [FIXED_TYPES[oid][0] for oid in type_oids]
        self.widths = [np.dtype(code).itemsize for code in self.formats]
        fields = [("count", ">i2")]
        for index, code in enumerate(self.formats):
            fields += [(f"length{index}", ">i4"), (f"value{index}", code)]
        self.row = np.dtype(fields)
        self.stride = self.row.itemsize

    def read(self, buffer: bytes) -> tuple[list[pa.RecordBatch], int]:
        """The complete rows at the start of `buffer` (up to the trailer) and the bytes they take."""
        batches, offset = [], 0
        while True:
            rows = (len(buffer) - offset) // self.stride
            if rows:
                view = np.frombuffer(buffer, dtype=self.row, count=rows, offset=offset)
                whole = view["count"] == len(self.widths)
                for index, width in enumerate(self.widths):
                    whole &= view[f"length{index}"] == width
                good = rows if whole.all() else int(np.argmin(whole))
                batches.append(self._fixed(view[:good]))
                offset += good * self.stride
            row = self._single(buffer, offset)
            if row is None:  # the trailer, or a row not complete yet
                return batches, offset
            batch, offset = row
            batches.append(batch)

    def _fixed(self, view: np.ndarray) -> pa.RecordBatch:
        columns = [pa.array(view[f"value{index}"].astype(field.type.to_pandas_dtype()), type=field.type)
                   for index, field in enumerate(self.schema)]
        return pa.record_batch(columns, schema=self.schema)

    def _single(self, buffer: bytes, offset: int) -> tuple[pa.RecordBatch, int] | None:
        """One row read field by field (it has a NULL), or None at the trailer or before an incomplete row."""
        if len(buffer) - offset < 2:
            return None
        (count,) = struct.unpack_from(">h", buffer, offset)
        if count == TRAILER:
            return None
        if count != len(self.widths):
            raise ValueError(f"binary COPY row with {count} fields, expected {len(self.widths)}")
        position, values = offset + 2, []
        for code, width in zip(self.formats, self.widths, strict=True):
            if len(buffer) - position < 4:
                return None
            (length,) = struct.unpack_from(">i", buffer, position)
            position += 4
            if length == -1:
                values.append(None)
                continue
            if length != width:
                raise ValueError(f"binary COPY field of {length} bytes, expected {width}")
            if len(buffer) - position < width:
                return None
            values.append(np.frombuffer(buffer, dtype=code, count=1, offset=position)[0].item())
            position += width
        columns = [pa.array([value], type=field.type) for value, field in zip(values, self.schema, strict=True)]
        return pa.record_batch(columns, schema=self.schema), position
