"""Engines turn rows into counts: each runs the scan's sqlglot queries and returns their result rows.

* ``duckdb`` (default): embedded; ``--data STAGE=PATH`` files as views; every core; progress on long scans.
* ``spark``: the user's SparkSession (:mod:`stagewatch.data.spark`); ``--data`` or ``--table STAGE=db.table``.
* counts read back from files (``--counts``), and the SQL a warehouse runs (``--emit-sql``):
  :mod:`stagewatch.data.counts`.

Nothing downstream knows which engine ran: the statistics read only the counts.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import Any, Callable

from stagewatch.data import sources
from stagewatch.data.dialects import render
from stagewatch.errors import StagewatchError

ENGINES = ("duckdb", "spark")
PROGRESS_AFTER_S = 1.0  # a scan that runs longer than this reports how far it got


@dataclass(frozen=True)
class Location:
    """Where a stage's rows are: ``data`` (a file or glob) or ``table`` (a table the engine knows)."""
    kind: str
    text: str


def normal(data: dict[str, Any]) -> dict[str, Location]:
    """Stage to location; a plain string is a path (``--data``)."""
    return {stage: where if isinstance(where, Location) else Location("data", str(where)) for stage, where in data.items()}


def locations(data: dict[str, str] | None = None, tables: dict[str, str] | None = None) -> dict[str, Location]:
    out = {stage: Location("data", path) for stage, path in (data or {}).items()}
    for stage, name in (tables or {}).items():
        if stage in out:
            raise StagewatchError(f"stage '{stage}' has both --data and --table", expected="one of them per stage")
        out[stage] = Location("table", name)
    return out


class DuckDBEngine:
    name = "duckdb"
    dialect = "duckdb"
    emits = False

    def __init__(self) -> None:
        self.con = sources.connect()
        self.on_progress: Callable[[float], None] | None = None
        self._progress_on = False

    def open(self, stage: str, where: Location, time_column: str, index: int) -> sources.Source:
        if where.kind != "data":
            raise StagewatchError(f"--table {stage}={where.text}: the DuckDB engine reads files",
                                  expected="--data STAGE=PATH, or --engine spark for a table")
        return sources.open_source(self.con, stage, where.text, time_column, index)

    def define(self, view: str, query: Any) -> None:
        """A view of our own naming (``--inject`` changes)."""
        self.con.execute(f"CREATE OR REPLACE VIEW {view} AS {render(query)}")  # view names are ours

    def rows(self, source: sources.Source, query: Any) -> list[tuple[Any, ...]]:
        from stagewatch.data.scan import pushdown

        text = render(pushdown(query, source), self.dialect)
        if self.on_progress is None:
            return self.con.execute(text).fetchall()
        if not self._progress_on:  # DuckDB measures progress only with its progress bar on (printing it off)
            self.con.execute("SET enable_progress_bar = true")
            self.con.execute("SET enable_progress_bar_print = false")
            self._progress_on = True
        done = threading.Event()
        report = self.on_progress

        def watch() -> None:
            while not done.wait(PROGRESS_AFTER_S):
                share = self.con.query_progress()
                if share is not None and share >= 0:
                    report(float(share))

        watcher = threading.Thread(target=watch, daemon=True)
        watcher.start()
        try:
            return self.con.execute(text).fetchall()
        finally:
            done.set()
            watcher.join()


def make(name: str) -> Any:
    """The engine named by ``--engine``."""
    if name == "duckdb":
        return DuckDBEngine()
    if name == "spark":
        from stagewatch.data.spark import SparkEngine

        return SparkEngine()
    raise StagewatchError(f"--engine {name!r} is not known", expected=" or ".join(ENGINES))
