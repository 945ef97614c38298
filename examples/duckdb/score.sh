#!/usr/bin/env bash
# Batch-score a table in a DuckDB database with SQL exported by featpipe. Needs bash and Python with
# the duckdb package only; featpipe is not installed where this runs.
#
#   usage: score.sh DATABASE SCORE_SQL TABLE
#
# SCORE_SQL is the file exported once per fitted model and committed next to it, for example
#   featpipe sql default_risk --part score --dialect duckdb --reasons 3 --into lease_scores > default_risk.duckdb.sql
# TABLE is the table that file creates (lease_scores above). The old table is dropped and the new one
# built in one transaction, so no reader sees the table missing or half-written, and a failure keeps
# the previous scores. Prints the number of rows per status.
set -euo pipefail

if [[ $# -ne 3 ]]; then
  echo "usage: $0 DATABASE SCORE_SQL TABLE" >&2
  exit 1
fi

"${PYTHON:-python3}" - "$1" "$2" "$3" <<'PY'
import sys

import duckdb

database, sql_file, table = sys.argv[1:]
with open(sql_file, encoding="utf-8") as stream:
    score_sql = stream.read()
connection = duckdb.connect(database)
quoted = '"' + table.replace('"', '""') + '"'
connection.execute("BEGIN TRANSACTION")
try:
    connection.execute(f"DROP TABLE IF EXISTS {quoted}")
    connection.execute(score_sql)
    connection.execute("COMMIT")
except duckdb.Error as error:
    connection.execute("ROLLBACK")
    sys.exit(f"scoring failed, previous scores kept: {error}")
for status, rows in connection.execute(f"SELECT status, COUNT(*) FROM {quoted} GROUP BY status ORDER BY status").fetchall():
    print(f"{rows}\t{status}")
PY
