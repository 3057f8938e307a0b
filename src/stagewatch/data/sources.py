"""Where a stage's log comes from: ``--data STAGE=PATH`` (a CSV, Parquet or JSON-lines file, or a glob of them),
opened in DuckDB as one view with a UTC timestamp column added.

Timestamps: TIMESTAMP WITH TIME ZONE values are converted to UTC; timestamps without a zone, and text without an
offset, are read as UTC. Numbers are refused (no silent guess between seconds and milliseconds).
"""

from __future__ import annotations

import glob
import hashlib
import os
from dataclasses import dataclass, field
from typing import Any

from stagewatch.errors import StagewatchError

TS = "__stagewatch_ts"  # the UTC timestamp column added to every view (seconds since the epoch, DOUBLE)
READERS = {".parquet": "parquet", ".pq": "parquet", ".csv": "csv", ".tsv": "csv", ".jsonl": "json",
           ".ndjson": "json", ".json": "json"}
_TIME_TYPES = ("TIMESTAMP", "DATE", "TIMESTAMP WITH TIME ZONE", "TIMESTAMP_NS", "TIMESTAMP_MS", "TIMESTAMP_S",
               "VARCHAR")


@dataclass
class Source:
    stage: str
    pattern: str
    paths: list[str]
    view: str
    columns: dict[str, str]  # column -> DuckDB type
    time_column: str
    files: list[dict[str, Any]] = field(default_factory=list)  # path, bytes, sha256
    table: str | None = None  # a table of the engine's catalog (--table), instead of files

    def describe(self) -> list[dict[str, Any]]:
        """What a baseline records of where the rows came from: each file's digest, or the table's name."""
        if self.table is not None:
            return [{"table": self.table}]
        return [file_digest(p) for p in self.paths if os.path.isfile(p)] or [{"path": self.pattern}]

    def has(self, column: str) -> bool:
        return column in self.columns

    def is_numeric(self, column: str) -> bool:
        kind = self.columns.get(column, "")
        return any(t in kind for t in ("INT", "DOUBLE", "FLOAT", "DECIMAL", "REAL", "NUMERIC"))


def parse_data_args(items: list[str] | None, option: str = "--data") -> dict[str, str]:
    """``STAGE=PATH`` pairs into a dict, with a usage error naming the item that is malformed or repeated."""
    out: dict[str, str] = {}
    for item in items or []:
        stage, sep, path = item.partition("=")
        if not sep or not stage or not path:
            raise StagewatchError(f"{option} {item!r} is not STAGE=PATH", expected=f"{option} stage_id=logs.parquet")
        if stage in out:
            raise StagewatchError(f"{option} names stage '{stage}' twice", expected="one path or glob per stage")
        out[stage] = path
    return out


def expand(pattern: str) -> list[str]:
    paths = sorted(p for p in glob.glob(pattern) if os.path.isfile(p)) if glob.has_magic(pattern) else [pattern]
    if not paths:
        raise StagewatchError("no file matches this pattern", file=pattern, expected="a CSV, Parquet or JSON-lines file or a glob of them")
    kinds = set()
    for path in paths:
        if not os.path.isfile(path):
            raise StagewatchError("no such file", file=path, expected="a CSV, Parquet or JSON-lines file")
        kind = READERS.get(os.path.splitext(path)[1].lower())
        if kind is None:
            raise StagewatchError("unknown file type", file=path,
                                  expected="a file ending in .parquet, .csv, .tsv, .jsonl, .ndjson or .json")
        kinds.add(kind)
    if len(kinds) > 1:
        raise StagewatchError(f"the files of one stage mix formats ({', '.join(sorted(kinds))})", file=pattern,
                              expected="one format per stage")
    return paths


def file_digest(path: str) -> dict[str, Any]:
    sha = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            sha.update(block)
    return {"path": path, "bytes": os.path.getsize(path), "sha256": sha.hexdigest()}


def open_source(con: Any, stage: str, pattern: str, time_column: str, index: int) -> Source:
    """Open a stage's files as a DuckDB view ``log_<index>`` with :data:`TS` added."""
    import duckdb

    paths = expand(pattern)
    kind = READERS[os.path.splitext(paths[0])[1].lower()]
    try:
        if kind == "parquet":
            rel = con.read_parquet(paths, union_by_name=True)
        elif kind == "csv":
            rel = con.read_csv(paths, union_by_name=True)
        else:
            rel = con.read_json(paths, format="newline_delimited")
    except duckdb.Error as exc:
        raise StagewatchError(f"cannot read this file: {str(exc).splitlines()[0]}", file=paths[0],
                              expected=f"a readable {kind} file") from None
    columns = {name: str(kind_) for name, kind_ in zip(rel.columns, rel.types)}
    ts_type = check_time_type(time_column, columns, pattern)
    raw = f"log_{index}_raw"
    rel.create_view(raw)
    from stagewatch.data import aggregates as ag

    view = f"log_{index}"
    con.execute(f"CREATE OR REPLACE VIEW {view} AS {ag.sql(with_seconds(raw, time_column, ts_type))}")  # our names
    return Source(stage=stage, pattern=pattern, paths=paths, view=view, columns=columns, time_column=time_column)


def seconds(time_column: str, ts_type: str) -> Any:
    """The UTC seconds since the epoch of the time column, as a DOUBLE: whole microseconds over 1e6, so every
    engine gets the same number. Text that is not a time becomes NULL (TRY_CAST)."""
    from sqlglot import exp

    from stagewatch.data import aggregates as ag
    from stagewatch.data.dialects import epoch_us

    target = exp.DataType.build("TIMESTAMPTZ")
    stamp = (exp.TryCast(this=ag.col(time_column), to=target) if ts_type in ("VARCHAR", "STRING")
             else exp.cast(ag.col(time_column), target))
    return exp.Div(this=exp.cast(epoch_us(stamp), "DOUBLE"), expression=exp.cast(exp.Literal.number(1000000), "DOUBLE"))


def with_seconds(table: Any, time_column: str, ts_type: str) -> Any:
    """``SELECT *, <UTC seconds> AS __stagewatch_ts FROM table``: the view every query of a stage reads."""
    from sqlglot import exp

    source = exp.to_table(table) if isinstance(table, str) else table
    return exp.select(exp.Star(), exp.alias_(seconds(time_column, ts_type), TS)).from_(source)


def check_time_type(time_column: str, columns: dict[str, str], where: str, time_types: tuple[str, ...] = ()) -> str:
    """The type of the time column, refusing a log without one or with numbers in it."""
    if time_column not in columns:
        raise StagewatchError(f"no column '{time_column}' (the log has: {', '.join(list(columns)[:12])})",
                              file=where, expected="a timestamp column; name it with --time-column")
    ts_type = columns[time_column]
    if ts_type not in (time_types or _TIME_TYPES):
        raise StagewatchError(f"column '{time_column}' holds {ts_type}, not timestamps", file=where,
                              expected="ISO 8601 timestamps (with or without an offset; without one, UTC)")
    return ts_type


def parse_time(text: str | None, option: str) -> float | None:
    """An ISO 8601 time (``2026-03-01``, ``2026-03-01T06:00``, with or without an offset; without one, UTC) as
    seconds since the epoch."""
    if text is None:
        return None
    from datetime import datetime, timezone

    try:
        moment = datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
    except ValueError:
        raise StagewatchError(f"{option} {text!r} is not a time", expected="ISO 8601, e.g. 2026-03-01T06:00 "
                              "(UTC unless an offset is given)") from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=timezone.utc)
    return moment.timestamp()


def parse_period(start: str | None, end: str | None) -> tuple[float | None, float | None]:
    """``--from`` and ``--to`` as seconds since the epoch, refusing a period that ends before it starts."""
    lo, hi = parse_time(start, "--from"), parse_time(end, "--to")
    if lo is not None and hi is not None and lo >= hi:
        raise StagewatchError("--from is not before --to", expected="a period with --from < --to")
    return lo, hi


def format_time(seconds: float | None) -> str | None:
    from datetime import datetime, timezone

    if seconds is None:
        return None
    return datetime.fromtimestamp(seconds, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def connect() -> Any:
    import duckdb

    con = duckdb.connect(":memory:")
    con.execute("SET TimeZone = 'UTC'")
    con.execute("SET enable_progress_bar_print = false")  # DuckDB would draw on standard output, where results go
    return con
