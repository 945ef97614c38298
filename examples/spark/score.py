"""Batch-score a table in Spark with SQL exported by featpipe. Needs PySpark only; featpipe is not
installed where this runs.

    spark-submit score.py SCORE_SQL OUTPUT_TABLE

SCORE_SQL is the plain scoring query, exported once per fitted model and committed next to it:

    featpipe sql default_risk --part score --dialect spark --reasons 3 > default_risk.spark.sql

It reads the input table by its name in the current database. The scores are written with
DataFrame.saveAsTable in overwrite mode, and the rows per status are printed.
"""

from __future__ import annotations

import sys


def score(spark, sql_file: str, output_table: str) -> dict[str, int]:
    """Run the exported query, write `output_table`, return the number of rows per status."""
    with open(sql_file, encoding="utf-8") as stream:
        query = stream.read().strip().rstrip(";")  # spark.sql takes one statement without the final ';'
    spark.sql(query).write.mode("overwrite").saveAsTable(output_table)
    counts = spark.table(output_table).groupBy("status").count().collect()
    return {row["status"]: row["count"] for row in sorted(counts, key=lambda row: row["status"])}


def main() -> None:
    if len(sys.argv) != 3:
        sys.exit("usage: spark-submit score.py SCORE_SQL OUTPUT_TABLE")
    from pyspark.sql import SparkSession

    spark = SparkSession.builder.appName("score").getOrCreate()
    try:
        for status, rows in score(spark, sys.argv[1], sys.argv[2]).items():
            print(f"{rows}\t{status}")
    finally:
        spark.stop()


if __name__ == "__main__":
    main()
