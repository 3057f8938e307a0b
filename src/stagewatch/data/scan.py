"""Run aggregates over a stage's log in DuckDB: one pass per stage, one row of counts per time bucket.

The time bucket of a row is ``floor((at - t) / step)``: bucket 0 holds the rows in ``(at - step, at]``, bucket k
the step before it, so any window ending at ``at`` whose length is a multiple of ``step`` is a sum of buckets.
"""

from __future__ import annotations

from typing import Any, Sequence

from sqlglot import exp

from stagewatch.data import aggregates as ag
from stagewatch.data.aggregates import Expr
from stagewatch.data.sources import TS, Source

Counts = dict[str, float]


def ts() -> exp.Expression:
    return exp.column(TS)


def period(start: float | None, end: float | None) -> Expr | None:
    """``start < t <= end`` (either side may be open)."""
    parts: list[Expr] = [ts().is_(exp.null()).not_()]
    if start is not None:
        parts.append(exp.GT(this=ts(), expression=ag.lit(float(start))))
    if end is not None:
        parts.append(exp.LTE(this=ts(), expression=ag.lit(float(end))))
    return exp.and_(*parts)


def run(con: Any, source: Source, aggregates: Sequence[ag.Aggregate], *, start: float | None = None,
        end: float | None = None, step: float | None = None) -> dict[int, Counts]:
    """Counts per bucket (bucket -1 when ``step`` is None: the whole period as one group)."""
    if not aggregates:
        return {}
    bucket = None
    if step is not None:
        assert end is not None
        age = exp.paren(exp.Sub(this=ag.lit(float(end)), expression=ts()))
        bucket = exp.func("floor", exp.Div(this=age, expression=ag.lit(float(step))))
    query = ag.select(source.view, aggregates, bucket=bucket, where=period(start, end))
    out: dict[int, Counts] = {}
    for row in con.execute(ag.sql(query)).fetchall():
        key = int(row[0]) if bucket is not None else -1
        values = row[1:] if bucket is not None else row
        out[key] = {a.key: float(v or 0) for a, v in zip(aggregates, values)}
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


def time_range(con: Any, source: Source) -> tuple[float | None, float | None, int, int]:
    """(first, last timestamp, rows, rows whose timestamp could not be read)."""
    query = exp.select(exp.func("min", ts()), exp.func("max", ts()), exp.Count(this=exp.Star()),
                       ag.count_if(ts().is_(exp.null()))).from_(exp.to_table(source.view))
    first, last, n, bad = con.execute(ag.sql(query)).fetchone()
    return first, last, int(n), int(bad or 0)


def hourly(con: Any, source: Source, start: float | None, end: float | None) -> dict[int, int]:
    """Rows per hour since the epoch."""
    hour = exp.func("floor", exp.Div(this=ts(), expression=ag.lit(3600.0)))
    query = ag.select(source.view, [ag.Aggregate("n", ag.rows())], bucket=hour, where=period(start, end))
    return {int(h): int(n) for h, n in con.execute(ag.sql(query)).fetchall()}


def profile(con: Any, source: Source, numeric: dict[str, tuple[Expr, list[float]]],
            categorical: list[str], start: float | None, end: float | None, limit: int) -> dict[str, Any]:
    """Quantiles, moments and ranges of numeric expressions; category frequencies of text columns."""
    out: dict[str, Any] = {}
    items: list[Expr] = []
    names = list(numeric)
    for name in names:
        value, probs = numeric[name]
        clean = exp.Case(ifs=[exp.If(this=ag.finite(value), true=value.copy())])
        items += [exp.func("quantile_cont", clean.copy(), exp.Array(expressions=[ag.lit(p) for p in probs or [0.5]])),
                  exp.func("avg", clean.copy()), exp.func("stddev_samp", clean.copy()),
                  exp.func("min", clean.copy()), exp.func("max", clean.copy()), exp.Count(this=clean.copy())]
    if items:
        query = exp.select(*items).from_(exp.to_table(source.view))
        where = period(start, end)
        if where is not None:
            query = query.where(where)
        row = con.execute(ag.sql(query)).fetchone()
        for i, name in enumerate(names):
            q, mean, sd, lo, hi, n = row[6 * i: 6 * i + 6]
            out[name] = {"quantiles": list(q or []) if numeric[name][1] else [], "mean": mean, "sd": sd,
                         "min": lo, "max": hi, "n": int(n or 0)}
    for column in categorical:
        value = ag.text(column)
        query = (exp.select(exp.alias_(value, "v"), exp.alias_(exp.Count(this=exp.Star()), "c"))
                 .from_(exp.to_table(source.view)).where(exp.and_(period(start, end), value.copy().is_(exp.null()).not_()))
                 .group_by(exp.column("v")).order_by(exp.Ordered(this=exp.column("c"), desc=True), exp.column("v"))
                 .limit(limit))
        out[f"categories:{column}"] = [(str(v), int(c)) for v, c in con.execute(ag.sql(query)).fetchall()]
    return out


def values_not_in(con: Any, source: Source, column: str, known: Sequence[str], start: float | None,
                  end: float | None, limit: int = 10) -> list[tuple[str, int]]:
    """The most frequent values of ``column`` in the period that are not among ``known``."""
    value = ag.text(column)
    cond = exp.and_(period(start, end), value.copy().is_(exp.null()).not_())
    if known:
        cond = exp.and_(cond, exp.not_(exp.In(this=value.copy(), expressions=[ag.lit(k) for k in known])))
    query = (exp.select(exp.alias_(value, "v"), exp.alias_(exp.Count(this=exp.Star()), "c"))
             .from_(exp.to_table(source.view)).where(cond).group_by(exp.column("v"))
             .order_by(exp.Ordered(this=exp.column("c"), desc=True), exp.column("v")).limit(limit))
    return [(str(v), int(c)) for v, c in con.execute(ag.sql(query)).fetchall()]
