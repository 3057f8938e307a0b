"""Counts that another engine produced: write them (``--save-counts``), read them back (``--counts``), and the
SQL a warehouse runs to produce them (``check --emit-sql DIALECT``).

Every query the scan runs has an identity (:func:`stagewatch.data.dialects.query_id`: the stage and the query's
text, whatever table it reads). A counts file answers queries by that identity, so a command run on counts asks
exactly the questions it would ask of the logs, and a file made for another plan, baseline, period or ``--at``
is refused instead of misread. Two shapes (``stagewatch schema counts``):

* the document ``--save-counts`` writes: ``{"format": "stagewatch-counts", "version": 1, "stages": {stage:
  {"time_column", "columns": {name: type}}}, "results": [{"query", "stage", "columns", "rows"}]}``;
* the result rows of emitted queries as a warehouse exports them: CSV with a header, a JSON array of objects or
  JSON lines, each row carrying the column ``stagewatch_query``.
"""

from __future__ import annotations

import csv
import json
import math
import os
import re
from decimal import Decimal
from typing import Any

from sqlglot import exp

from stagewatch.data import sources
from stagewatch.data.dialects import output_names, query_id, render, table_name
from stagewatch.data.engines import Location
from stagewatch.errors import StagewatchError

FORMAT = "stagewatch-counts"
VERSION = 1
QUERY_COLUMN = "stagewatch_query"


def _plain(value: Any) -> Any:
    """A result value as JSON: numbers, text, null, lists; NaN and infinity as null."""
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, Decimal):
        value = float(value)
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, int):
        return value
    try:
        return _plain(value.item())  # numpy scalars
    except AttributeError:
        return str(value)


class Recorder:
    """An engine that runs another one and keeps every result, for ``--save-counts``."""

    def __init__(self, engine: Any) -> None:
        self.engine = engine
        self.name, self.dialect, self.emits = engine.name, engine.dialect, False
        self.stages: dict[str, Any] = {}
        self.results: dict[str, Any] = {}

    def __setattr__(self, key: str, value: Any) -> None:
        if key == "on_progress":
            setattr(self.engine, key, value)
        object.__setattr__(self, key, value)

    def open(self, stage: str, where: Location, time_column: str, index: int) -> sources.Source:
        source = self.engine.open(stage, where, time_column, index)
        self.stages[stage] = {"time_column": time_column, "columns": dict(source.columns)}
        return source

    def define(self, view: str, query: Any) -> None:
        self.engine.define(view, query)

    def rows(self, source: sources.Source, query: Any) -> list[tuple[Any, ...]]:
        from stagewatch.data.scan import pushdown

        found = self.engine.rows(source, query)
        key = query_id(source.stage, query)
        self.results[key] = {"query": key, "stage": source.stage, "columns": output_names(query),
                             "sql": render(pushdown(query, source)),
                             "rows": [[_plain(v) for v in row] for row in found]}
        return found

    def document(self) -> dict[str, Any]:
        return {"format": FORMAT, "version": VERSION, "engine": self.name, "stages": self.stages,
                "results": list(self.results.values())}

    def save(self, path: str, inputs: list[str]) -> None:
        from stagewatch.safewrite import safe_write

        safe_write(path, json.dumps(self.document(), indent=1, sort_keys=True, allow_nan=False) + "\n",
                   inputs=inputs)


def _number(text: str, path: str, line: int) -> Any:
    if text == "" or text.upper() == "NULL":
        return None
    try:
        value = float(text)
    except ValueError:
        return text  # a category value (the unseen-values query)
    return int(value) if value.is_integer() and "." not in text and "e" not in text.lower() else value


def _rows_file(path: str) -> list[tuple[int, dict[str, Any]]]:
    """(line, row) pairs of a CSV with a header, a JSON array of objects or JSON lines."""
    with open(path, encoding="utf-8-sig", newline="") as handle:
        text = handle.read()
    if path.lower().endswith((".csv", ".tsv")):
        reader = csv.DictReader(text.splitlines(), delimiter="\t" if path.lower().endswith(".tsv") else ",")
        return [(i + 2, {k.strip().lower(): _number(v or "", path, i + 2) for k, v in row.items() if k})
                for i, row in enumerate(reader)]
    stripped = text.lstrip()
    if stripped.startswith("["):
        items = json.loads(text)
        return [(1, {str(k).lower(): v for k, v in item.items()}) for item in items if isinstance(item, dict)]
    out = []
    for i, line in enumerate(text.splitlines()):
        if line.strip():
            item = json.loads(line)
            if not isinstance(item, dict):
                raise StagewatchError("a line that is not a JSON object", file=path, line=i + 1,
                                      expected="one JSON object per line")
            out.append((i + 1, {str(k).lower(): v for k, v in item.items()}))
    return out


class CountsEngine:
    """Answers the scan's queries from counts files (``--counts``)."""

    name = "counts"
    dialect = "duckdb"
    emits = False

    def __init__(self, paths: list[str]) -> None:
        self.paths = paths
        self.stages: dict[str, Any] = {}
        self.results: dict[str, Any] = {}
        self.rows_by_query: dict[str, list[tuple[str, int, dict[str, Any]]]] = {}
        self.baseline: dict[str, Any] | None = None
        self.on_progress = None
        for path in paths:
            self._load(path)

    def _load(self, path: str) -> None:
        if not os.path.isfile(path):
            raise StagewatchError("no such file", file=path, expected="a counts file (CSV or JSON)")
        try:
            with open(path, encoding="utf-8-sig") as handle:
                head = handle.read(4096).lstrip()
            if head.startswith("{") and f'"{FORMAT}"' in head or (head.startswith("{") and '"results"' in head):
                with open(path, encoding="utf-8") as handle:
                    doc = json.load(handle)
                self._document(doc, path)
                return
            rows = _rows_file(path)
        except (json.JSONDecodeError, UnicodeDecodeError, csv.Error) as exc:
            raise StagewatchError(f"cannot read these counts: {exc}", file=path,
                                  expected="CSV with a header, a JSON array of objects, JSON lines, or a file "
                                  "written by --save-counts (stagewatch schema counts)") from None
        for line, row in rows:
            key = row.get(QUERY_COLUMN)
            if not isinstance(key, str) or not re.fullmatch(r"q[0-9a-f]{20}", key):
                raise StagewatchError(f"a row without a valid '{QUERY_COLUMN}' column", file=path, line=line,
                                      expected="the rows of queries written by `stagewatch check --emit-sql`")
            self.rows_by_query.setdefault(key, []).append((path, line, row))

    def _document(self, doc: Any, path: str) -> None:
        from stagewatch.resources import validator

        errors = sorted(validator("counts").iter_errors(doc), key=lambda e: list(e.path))
        if errors:
            where = "/".join(str(p) for p in errors[0].path) or "the document"
            raise StagewatchError(f"{where}: {errors[0].message}", file=path,
                                  expected="a counts document (stagewatch schema counts)")
        self.stages.update(doc["stages"])
        for result in doc["results"]:
            self.results[result["query"]] = result

    def open(self, stage: str, where: Location, time_column: str, index: int) -> sources.Source:
        known = self.stages.get(stage)
        if known is not None:
            columns, time_column = dict(known["columns"]), known.get("time_column", time_column)
        else:
            columns = _baseline_columns(self.baseline, stage, "--counts")
        return sources.Source(stage=stage, pattern=", ".join(self.paths), paths=list(self.paths),
                              view=f"log_{index}", columns=columns, time_column=time_column)

    def define(self, view: str, query: Any) -> None:
        raise StagewatchError("--inject needs the logs, not counts", expected="replay --inject with --data")

    def rows(self, source: sources.Source, query: Any) -> list[tuple[Any, ...]]:
        key = query_id(source.stage, query)
        names = output_names(query)
        if key in self.results:
            result = self.results[key]
            index = {c.lower(): i for i, c in enumerate(result["columns"])}
            return [tuple(row[index[n]] if n in index else None for n in names) for row in result["rows"]]
        if key in self.rows_by_query:
            out = []
            for path, line, row in self.rows_by_query[key]:
                if all(row.get(n) is None for n in names):
                    continue  # the marker row every emitted query adds
                missing = [n for n in names if n not in row]
                if missing:
                    raise StagewatchError(f"the row has no column {', '.join(missing)}", file=path, line=line,
                                          expected=f"the columns of query {key}: {', '.join(names)}")
                out.append(tuple(row[n] for n in names))
            return out
        raise StagewatchError(f"the counts have no result for query {key} of stage '{source.stage}'",
                              file=", ".join(self.paths),
                              expected="counts made for this plan, baseline and options (--at, --window, "
                              "--from/--to): emit the SQL or save the counts again")


def _baseline_columns(baseline: dict[str, Any] | None, stage: str, option: str) -> dict[str, str]:
    found = ((baseline or {}).get("stages", {}).get(stage) or {}).get("column_types")
    if found is None:
        raise StagewatchError(f"{option}: the baseline does not record the columns of stage '{stage}'",
                              expected="a baseline made by this version of `stagewatch calibrate`")
    return dict(found)


class EmitEngine:
    """Collects the queries a command asks (answering none) for ``--emit-sql``."""

    name = "emit"
    emits = True

    def __init__(self, dialect: str) -> None:
        self.dialect = dialect
        self.baseline: dict[str, Any] | None = None
        self.queries: list[tuple[str, str, Any, sources.Source]] = []
        self.on_progress = None

    def open(self, stage: str, where: Location, time_column: str, index: int) -> sources.Source:
        if where.kind != "table":
            raise StagewatchError(f"--emit-sql reads tables: --data {stage}=... cannot be emitted",
                                  expected="--table STAGE=NAME for each stage")
        table_name(where.text)
        columns = _baseline_columns(self.baseline, stage, "--emit-sql")
        return sources.Source(stage=stage, pattern=where.text, paths=[], view=f"log_{index}", columns=columns,
                              time_column=time_column, table=where.text)

    def define(self, view: str, query: Any) -> None:
        raise StagewatchError("--inject cannot be emitted as SQL", expected="replay --inject with --data")

    def rows(self, source: sources.Source, query: Any) -> list[tuple[Any, ...]]:
        key = query_id(source.stage, query)
        if all(k != key for k, *_ in self.queries):
            self.queries.append((key, source.stage, query, source))
        return []

    def sql(self) -> str:
        """Every query collected, in the dialect, each reading its stage's table with UTC seconds added."""
        out = [f"-- stagewatch: {len(self.queries)} queries ({self.dialect}). Run each; export every result "
               f"with its header (CSV) or as JSON rows, and pass the files to --counts.",
               "-- Times without a zone are read in the session's time zone: set it to UTC.",
               "-- Each query's last row is NULL but for stagewatch_query: keep it (an empty result needs it)."]
        for key, stage, query, source in self.queries:
            ts_type = source.columns.get(source.time_column, "TIMESTAMP")
            inner = sources.with_seconds(table_name(source.table or ""), source.time_column, ts_type)
            tree = query.copy()
            # last, so that GROUP BY 1 and ORDER BY 2 still name the bucket and the count
            tree.set("expressions", [*tree.expressions, exp.alias_(exp.Literal.string(key), QUERY_COLUMN)])
            tree = tree.transform(lambda n: exp.Subquery(this=inner.copy(), alias=exp.TableAlias(
                this=exp.to_identifier("log"))) if isinstance(n, exp.Table) else n)
            # one more row, NULL but for the query's identity, so that an empty result still says which query
            # it answers
            marker = exp.select(*[exp.alias_(exp.null(), name) for name in output_names(query)],
                                exp.alias_(exp.Literal.string(key), QUERY_COLUMN))
            tree = exp.union(exp.select(exp.Star()).from_(tree.subquery("result")), marker, distinct=False)
            safe = re.sub(r"[^A-Za-z0-9_.-]", "_", stage)
            out.append(f"\n-- query {key}, stage {safe}\n{render(tree, self.dialect)};")
        return "\n".join(out) + "\n"
