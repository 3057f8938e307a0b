"""``--engine spark``: the scan's queries through a SparkSession; only the counts come back to the driver.

The session is the user's own (``SparkSession.builder.getOrCreate()``: whatever ``spark.master`` and
configuration ``spark-submit``, ``PYSPARK_SUBMIT_ARGS`` or ``spark-defaults.conf`` give). Our queries run in a
session of their own on the same context (``newSession``), with the time zone set to UTC (timestamps without a
zone are read as UTC, as on DuckDB), so the user's session settings are left as they were. Text read as a number
goes through TRY_CAST, so ANSI mode (on by default since Spark 4) turns bad text into NULL, as on DuckDB.
"""

from __future__ import annotations

import glob
import os
from typing import Any

from stagewatch.data import sources
from stagewatch.data.dialects import render, table_name
from stagewatch.data.engines import Location
from stagewatch.errors import StagewatchError

INSTALL = "pip install 'stagewatch[spark]'"
# Spark's type names (simpleString, upper case) to DuckDB's, so a baseline records the same types whichever
# engine made it
_TYPES = {"TIMESTAMP": "TIMESTAMP WITH TIME ZONE", "TIMESTAMP_NTZ": "TIMESTAMP", "STRING": "VARCHAR",
          "INT": "INTEGER", "TINYINT": "TINYINT", "SMALLINT": "SMALLINT", "BIGINT": "BIGINT"}


def session() -> Any:
    """The user's SparkSession (created from their configuration when none runs yet)."""
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        raise StagewatchError("--engine spark needs PySpark, which is not installed",
                              expected=f"PySpark installed with: {INSTALL}") from None
    try:
        return SparkSession.builder.appName("stagewatch").getOrCreate()
    except Exception as exc:  # noqa: BLE001 - a JVM that does not start raises plain exceptions
        raise StagewatchError(f"Spark did not start: {str(exc).splitlines()[0] if str(exc) else type(exc).__name__}",
                              expected="a Java runtime (17 or newer) on PATH or in JAVA_HOME, and a reachable "
                              "spark.master") from None


class SparkEngine:
    name = "spark"
    dialect = "spark"
    emits = False

    def __init__(self, spark: Any = None) -> None:
        self.spark = (spark or session()).newSession()
        self.spark.conf.set("spark.sql.session.timeZone", "UTC")
        self.on_progress = None

    def _read(self, stage: str, where: Location) -> tuple[Any, list[str], str]:
        if where.kind == "table":
            name = table_name(where.text)
            try:
                return self.spark.table(name.sql(dialect="spark")), [], where.text
            except Exception as exc:  # noqa: BLE001 - Spark's AnalysisException and friends
                raise StagewatchError(f"Spark cannot read table {where.text!r}: {str(exc).splitlines()[0]}",
                                      expected="a table the session's catalog knows, as DB.TABLE") from None
        pattern = where.text
        local = sorted(p for p in glob.glob(pattern) if os.path.isfile(p))
        paths = sources.expand(pattern) if local or not _remote(pattern) else [pattern]
        kind = sources.READERS.get(os.path.splitext(paths[0])[1].lower())
        if kind is None:
            raise StagewatchError("unknown file type", file=pattern,
                                  expected="a file ending in .parquet, .csv, .tsv, .jsonl, .ndjson or .json")
        reader = self.spark.read
        try:
            if kind == "parquet":
                frame = reader.parquet(*paths)
            elif kind == "csv":
                frame = reader.csv(paths, header=True, inferSchema=True)
            else:
                frame = reader.json(paths)
        except Exception as exc:  # noqa: BLE001
            raise StagewatchError(f"Spark cannot read this: {str(exc).splitlines()[0]}", file=pattern,
                                  expected=f"a readable {kind} file") from None
        return frame, [p for p in paths if os.path.isfile(p)], pattern

    def open(self, stage: str, where: Location, time_column: str, index: int) -> sources.Source:
        frame, paths, shown = self._read(stage, where)
        columns = {f.name: _TYPES.get(kind, kind) for f in frame.schema.fields
                   for kind in [f.dataType.simpleString().upper()]}
        ts_type = sources.check_time_type(time_column, columns, shown)
        raw, view = f"stagewatch_log_{index}_raw", f"stagewatch_log_{index}"  # names are ours
        frame.createOrReplaceTempView(raw)
        self.spark.sql(f"CREATE OR REPLACE TEMP VIEW {view} AS "
                       f"{render(sources.with_seconds(raw, time_column, ts_type), 'spark')}")
        return sources.Source(stage=stage, pattern=shown, paths=paths, view=view, columns=columns,
                              time_column=time_column, table=where.text if where.kind == "table" else None)

    def define(self, view: str, query: Any) -> None:
        """A temporary view of our own naming (``--inject`` changes)."""
        self.spark.sql(f"CREATE OR REPLACE TEMP VIEW {view} AS {render(query, self.dialect)}")  # view names are ours

    def rows(self, source: sources.Source, query: Any) -> list[tuple[Any, ...]]:
        from stagewatch.data.scan import pushdown

        text = render(pushdown(query, source), self.dialect)
        try:
            return [tuple(row) for row in self.spark.sql(text).collect()]
        except Exception as exc:  # noqa: BLE001 - Spark's errors (analysis, out of memory, a lost JVM) are plain
            first = next((line for line in str(exc).splitlines() if line.strip()), type(exc).__name__)
            raise StagewatchError(f"Spark could not run the scan of {source.stage}: {first[:300]}",
                                  file=source.pattern, expected="a running Spark with the memory the scan needs "
                                  "(grouped counts: raise spark.executor.memory)") from None


def _remote(pattern: str) -> bool:
    return "://" in pattern or pattern.startswith(("dbfs:", "s3a:", "abfss:", "gs:", "hdfs:"))
