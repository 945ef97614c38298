#!/usr/bin/env bash
# Batch-score a table in PostgreSQL with SQL exported by featpipe. Needs psql only; featpipe is not
# installed where this runs (a cron job, an Airflow BashOperator, a CI schedule).
#
#   usage: score.sh SCORE_SQL TABLE
#
# The connection comes from DATABASE_URL when set (a libpq connection string or URI), otherwise from
# the usual PGHOST, PGPORT, PGUSER, PGDATABASE and PGPASSWORD or ~/.pgpass. SCORE_SQL is exported once
# per fitted model and committed next to it, for example
#   featpipe sql default_risk --part score --dialect postgres --reasons 3 --into lease_scores > default_risk.postgres.sql
# TABLE is the table that file creates. Everything runs in one transaction: other sessions never see
# the table missing or half-written, and any error (ON_ERROR_STOP) rolls it all back, keeping the old scores.
set -euo pipefail

if [[ $# -ne 2 ]]; then
  echo "usage: $0 SCORE_SQL TABLE" >&2
  exit 1
fi
score_sql=$1
table=${2//\"/\"\"}
connection=()
if [[ -n "${DATABASE_URL:-}" ]]; then
  connection=(--dbname "$DATABASE_URL")
fi

psql "${connection[@]}" --no-psqlrc --quiet --tuples-only --no-align --field-separator=$'\t' \
  --set ON_ERROR_STOP=1 --single-transaction \
  --command "DROP TABLE IF EXISTS \"$table\"" \
  --file "$score_sql" \
  --command "SELECT COUNT(*), status FROM \"$table\" GROUP BY status ORDER BY status"
