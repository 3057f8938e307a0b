"""Run aggregates over a stage's log on an engine: one pass per stage, one row of counts per time bucket.

The time bucket of a row is ``floor((at - t) / step)``: bucket 0 holds the rows in ``(at - step, at]``, bucket k
the step before it, so any window ending at ``at`` whose length is a multiple of ``step`` is a sum of buckets.
Every query is a sqlglot expression whose result columns all have names; the engine (DuckDB, Spark, counts read
back from a file) only runs it (:mod:`stagewatch.data.engines`).
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Any, Sequence

from sqlglot import exp

from stagewatch.data import aggregates as ag
from stagewatch.data import quantiles
from stagewatch.data.aggregates import Expr
from stagewatch.data.sources import TS, Source

Counts = dict[str, float]
_STAMPS = {"TIMESTAMP": "TIMESTAMP", "TIMESTAMP_NS": "TIMESTAMP", "TIMESTAMP_MS": "TIMESTAMP",
           "TIMESTAMP_S": "TIMESTAMP", "TIMESTAMP_NTZ": "TIMESTAMP",
           "TIMESTAMP WITH TIME ZONE": "TIMESTAMPTZ", "TIMESTAMP_LTZ": "TIMESTAMPTZ"}


def ts() -> exp.Expression:
    return exp.column(TS)


def _stored(source: Source | None, seconds: float, pad: float) -> Expr | None:
    """The stored time column against a moment ``pad`` seconds beyond ``seconds``, as a literal of the column's
    own type: a looser filter than the exact one on UTC seconds, which the engine can push into the file scan
    (Parquet row groups are skipped by their min and max)."""
    if source is None or source.table is not None:
        return None
    kind = _STAMPS.get(source.columns.get(source.time_column, ""))
    if kind is None:
        return None
    moment = datetime.fromtimestamp(seconds + pad, tz=timezone.utc)
    text = moment.strftime("%Y-%m-%d %H:%M:%S") + ("+00:00" if kind == "TIMESTAMPTZ" else "")
    return exp.cast(exp.Literal.string(text), kind)


def period(start: float | None, end: float | None) -> Expr:
    """``start < t <= end`` (either side may be open)."""
    parts: list[Expr] = [ts().is_(exp.null()).not_()]
    if start is not None:
        parts.append(exp.GT(this=ts(), expression=ag.lit(float(start))))
    if end is not None:
        parts.append(exp.LTE(this=ts(), expression=ag.lit(float(end))))
    return exp.and_(*parts)


def _within(query: Any, start: float | None, end: float | None) -> Any:
    """Note the period on the query for :func:`pushdown` (metadata: not part of its text or identity)."""
    query.meta["period"] = (start, end)
    return query


def pushdown(query: Any, source: Source) -> Any:
    """The query with a looser filter on the stored time column added to each ``SELECT`` that reads the log
    (a nested one too), for an engine that reads files: the exact filter is on UTC seconds computed from it,
    which no file reader can use to skip row groups."""
    tree = query.copy()
    for node in list(tree.find_all(exp.Select)):
        start, end = node.meta.get("period", (None, None))
        parts: list[Expr] = []
        if start is not None and (low := _stored(source, start, -2.0)) is not None:
            parts.append(exp.GTE(this=ag.col(source.time_column), expression=low))
        if end is not None and (high := _stored(source, end, 2.0)) is not None:
            parts.append(exp.LTE(this=ag.col(source.time_column), expression=high))
        if parts:
            node.where(*parts, append=True, copy=False)
    return tree


def bucket_of(end: float, step: float) -> Expr:
    age = exp.paren(exp.Sub(this=ag.lit(float(end)), expression=ts()))
    return exp.func("floor", exp.Div(this=age, expression=ag.lit(float(step))))


def run(engine: Any, source: Source, aggregates: Sequence[ag.Aggregate], *, start: float | None = None,
        end: float | None = None, step: float | None = None) -> dict[int, Counts]:
    """Counts per bucket (bucket -1 when ``step`` is None: the whole period as one group); every bucket that has
    rows carries every key (0 where nothing was counted).

    Plain aggregates run in one ``SELECT`` per stage; bin and category counts run as one ``GROUP BY bucket,
    index`` per column (:class:`~stagewatch.data.aggregates.Aggregate`): a query with one ``SUM(CASE ...)`` per
    bin costs an expression per bin per row, while the index costs a binary search per row."""
    if not aggregates:
        return {}
    bucket = None
    if step is not None:
        assert end is not None
        bucket = bucket_of(end, step)
    where = period(start, end)
    plain = [a for a in aggregates if a.index is None]
    groups: dict[str, list[ag.Aggregate]] = {}
    for a in aggregates:
        if a.index is not None:
            groups.setdefault(ag.sql(a.index), []).append(a)
    out: dict[int, Counts] = {} if step is not None else {-1: {}}
    if plain:
        query = _within(ag.select(source.view, plain, bucket=bucket, where=where), start, end)
        for row in engine.rows(source, query):
            key = int(row[0]) if bucket is not None else -1
            values = row[1:] if bucket is not None else row
            out.setdefault(key, {}).update({a.key: float(v or 0) for a, v in zip(plain, values)})
    for members in groups.values():
        index: Expr = members[0].index
        items = ([exp.alias_(bucket.copy(), "bucket")] if bucket is not None else []) + [
            exp.alias_(index.copy(), "slot"), exp.alias_(ag.rows(), "n")]
        query = exp.select(*items).from_(exp.to_table(source.view)).where(
            exp.and_(where.copy(), index.copy().is_(exp.null()).not_()))  # type: ignore[union-attr]
        query = _within(query.group_by(*[exp.Literal.number(i + 1) for i in range(len(items) - 1)]), start, end)
        by_slot: dict[int, list[str]] = {}
        for a in members:  # two checks may bin one column on the same edges: both get the counts
            by_slot.setdefault(a.slot, []).append(a.key)
        for row in engine.rows(source, query):
            key = int(row[0]) if bucket is not None else -1
            slot, n = row[-2], row[-1]
            for name in by_slot.get(int(slot), []):
                out.setdefault(key, {})[name] = float(n or 0)
    keys = [a.key for a in aggregates]
    for counts in out.values():
        for k in keys:
            counts.setdefault(k, 0.0)
    return out


def total(buckets: dict[int, Counts], first: int, last: int, keys: Sequence[str]) -> Counts:
    """Sum of buckets ``first .. last`` (inclusive) for ``keys``; absent buckets count as zero."""
    out = {k: 0.0 for k in keys}
    for b in range(first, last + 1):
        row = buckets.get(b)
        if row:
            for k in keys:
                out[k] += row.get(k, 0.0)
    return out


def time_range(engine: Any, source: Source) -> tuple[float | None, float | None, int, int]:
    """(first, last timestamp, rows, rows whose timestamp could not be read)."""
    query = exp.select(exp.alias_(exp.func("min", ts()), "t_first"), exp.alias_(exp.func("max", ts()), "t_last"),
                       exp.alias_(exp.Count(this=exp.Star()), "n_rows"),
                       exp.alias_(ag.count_if(ts().is_(exp.null())), "n_unreadable")).from_(exp.to_table(source.view))
    found = engine.rows(source, query)
    if not found:
        return None, None, 0, 0
    first, last, n, bad = found[0]
    return (None if first is None else float(first)), (None if last is None else float(last)), int(n or 0), int(bad or 0)


def hourly(engine: Any, source: Source, start: float | None, end: float | None) -> dict[int, int]:
    """Rows per hour since the epoch."""
    hour = exp.func("floor", exp.Div(this=ts(), expression=ag.lit(3600.0)))
    query = _within(ag.select(source.view, [ag.Aggregate("n", ag.rows())], bucket=hour, where=period(start, end)),
                    start, end)
    return {int(h): int(n) for h, n in engine.rows(source, query)}


def profile(engine: Any, source: Source, numeric: dict[str, tuple[Expr, list[float]]],
            categorical: list[str], start: float | None, end: float | None, limit: int) -> dict[str, Any]:
    """Quantiles (exact, :mod:`stagewatch.data.quantiles`), moments and ranges of numeric expressions; category
    frequencies. Moments and ranges of every expression come from one query; the quantiles of each distinct
    expression from a few grouped counts of their own, one expression at a time."""
    out: dict[str, Any] = {}
    items: list[Expr] = []
    names = list(numeric)
    where = period(start, end)
    for i, name in enumerate(names):
        value, _ = numeric[name]
        clean = exp.Case(ifs=[exp.If(this=ag.finite(value), true=value.copy())])
        items += [exp.alias_(exp.func("avg", clean.copy()), f"mean{i}"),
                  exp.alias_(exp.func("stddev_samp", clean.copy()), f"sd{i}"),
                  exp.alias_(exp.func("min", clean.copy()), f"min{i}"), exp.alias_(exp.func("max", clean.copy()), f"max{i}"),
                  exp.alias_(exp.Count(this=clean.copy()), f"n{i}")]
    if items:
        query = _within(exp.select(*items).from_(exp.to_table(source.view)).where(where.copy()), start, end)
        found = engine.rows(source, query)
        row = found[0] if found else [None] * len(items)
        rows = quantiles.Rows(run=lambda q: engine.rows(source, q), view=source.view, where=where,
                              period=(start, end), file=source.pattern)
        levels: dict[str, list[float]] = {}  # expression text -> levels wanted, over every check reading it
        for name in names:
            value, probs = numeric[name]
            levels.setdefault(ag.sql(value), []).extend(probs)
        computed: dict[str, dict[float, float]] = {}
        for i, name in enumerate(names):
            value, probs = numeric[name]
            mean, sd, lo, hi, n = row[5 * i: 5 * i + 5]
            text = ag.sql(value)
            if probs and text not in computed:
                wanted = sorted(set(levels[text]))
                computed[text] = dict(zip(wanted, quantiles.exact(rows, value, wanted, int(n or 0), lo, hi)))
            out[name] = {"quantiles": [computed[text][p] for p in probs] if probs and computed[text] else [],
                         "mean": mean, "sd": sd, "min": lo, "max": hi, "n": int(n or 0)}
    for column in categorical:
        out[f"categories:{column}"] = _frequent(engine, source, column, None, start, end, limit)
    return out


def _frequent(engine: Any, source: Source, column: str, known: Sequence[str] | None, start: float | None,
              end: float | None, limit: int) -> list[tuple[str, int]]:
    """The most frequent values of ``column`` in the period (those not among ``known``, when given)."""
    value = ag.text(column)
    cond = exp.and_(period(start, end), value.copy().is_(exp.null()).not_())
    if known:
        cond = exp.and_(cond, exp.not_(exp.In(this=value.copy(), expressions=[ag.lit(k) for k in known])))
    query = (exp.select(exp.alias_(value, "v"), exp.alias_(exp.Count(this=exp.Star()), "c"))
             .from_(exp.to_table(source.view)).where(cond).group_by(exp.Literal.number(1))
             .order_by(exp.Ordered(this=exp.Literal.number(2), desc=True), exp.Literal.number(1)).limit(limit))
    _within(query, start, end)
    return [(str(v), int(c)) for v, c in engine.rows(source, query)]


def values_not_in(engine: Any, source: Source, column: str, known: Sequence[str], start: float | None,
                  end: float | None, limit: int = 10) -> list[tuple[str, int]]:
    """The most frequent values of ``column`` in the period that are not among ``known``."""
    return _frequent(engine, source, column, known, start, end, limit)
