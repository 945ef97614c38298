"""PostgreSQL results of numbers and booleans arrive by binary COPY, read with numpy (featpipe.engines.pgbinary).

Expected values are plain arithmetic on generate_series(1, 20), written out in Python below; the
bytes are PostgreSQL 15's own binary COPY output of the same query.
"""

from __future__ import annotations

import pyarrow as pa
import pytest
import sqlglot

from featpipe.engines.pgbinary import binary_batches, fixed_width

QUERY = """
SELECT i::bigint AS k,
       CASE WHEN i % 3 = 0 THEN NULL ELSE i * 0.5::float8 END AS half,
       (i % 2 = 0) AS even,
       CASE WHEN i = 20 THEN NULL ELSE i::int2 END AS small,
       i::int4 * 1000 AS thousands,
       i::real / 4 AS quarter
FROM generate_series(1, 20) AS i
ORDER BY i
"""
NAMES = ["k", "half", "even", "small", "thousands", "quarter"]
ROWS = range(1, 21)
EXPECTED = {
    "k": list(ROWS),
    "half": [None if i % 3 == 0 else i * 0.5 for i in ROWS],
    "even": [i % 2 == 0 for i in ROWS],
    "small": [None if i == 20 else i for i in ROWS],  # the last row has a NULL: read after the runs before it
    "thousands": [i * 1000 for i in ROWS],
    "quarter": [i / 4 for i in ROWS],  # exact in float4
}


def copied_bytes(engine) -> tuple[bytes, list[int]]:
    """The binary COPY output of QUERY and the type OIDs of its columns, straight from the server."""
    with engine.connection.cursor() as cursor:
        cursor.execute(QUERY)
        oids = [column.type_code for column in cursor.description]
        with cursor.copy(f"COPY ({QUERY}) TO STDOUT (FORMAT BINARY)") as stream:
            data = b"".join(bytes(chunk) for chunk in stream)
    return data, oids


def test_fetch_batches_reads_numbers_booleans_and_nulls_by_binary_copy(postgres_engine):
    batches = list(postgres_engine.fetch_batches(sqlglot.parse_one(QUERY, read="postgres"), 6))

    assert [batch.num_rows for batch in batches] == [6, 6, 6, 2]
    assert batches[0].schema.types == [pa.int64(), pa.float64(), pa.bool_(), pa.int64(), pa.int64(), pa.float64()]
    assert pa.Table.from_batches(batches).to_pydict() == EXPECTED


@pytest.mark.parametrize("chunk_bytes", [1, 7, 64, 1 << 20])
def test_the_reader_takes_the_bytes_cut_anywhere(postgres_engine, chunk_bytes):
    data, oids = copied_bytes(postgres_engine)
    chunks = [data[start : start + chunk_bytes] for start in range(0, len(data), chunk_bytes)]

    batches = list(binary_batches(chunks, NAMES, oids, 4))

    assert [batch.num_rows for batch in batches] == [4] * 5
    assert pa.Table.from_batches(batches).to_pydict() == EXPECTED


def test_text_and_numeric_results_keep_the_cursor_route(postgres_engine):
    query = sqlglot.parse_one("SELECT i AS k, 'row ' || i AS label, i * 0.5 AS exact FROM generate_series(1, 3) AS i ORDER BY i",
                              read="postgres")
    table = pa.Table.from_batches(list(postgres_engine.fetch_batches(query, 2)))
    assert table.to_pydict() == {"k": [1, 2, 3], "label": ["row 1", "row 2", "row 3"], "exact": [0.5, 1.0, 1.5]}
    assert not fixed_width([23, 25]) and not fixed_width([1700]) and fixed_width([20, 701, 16])
