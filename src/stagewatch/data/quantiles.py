"""Exact quantiles of a column for calibrate, in memory that does not grow with the column's rows.

**Definition** (numpy's default, ``numpy.quantile(x, p)``, method ``linear``, type 7 of Hyndman and Fan; the
definition of DuckDB's ``quantile_cont`` and Spark's ``percentile`` too): with the n finite values sorted,
x[0] <= ... <= x[n-1], h = (n - 1) p, j = floor(h), g = h - j, the quantile is x[n-1] when h >= n - 1, else
x[j] + g (x[j+1] - x[j]), rounded as numpy rounds it (x[j+1] - (1 - g)(x[j+1] - x[j]) when g >= 0.5), with
zero always +0.0 (an engine's MIN or GROUP BY may return either -0.0 or 0.0, which compare equal). The
engines give only order statistics x[k]; the interpolation is done here, so a baseline has the same bits
whichever engine made it (DuckDB's and Spark's own functions round the interpolation differently from each
other and from numpy; DuckDB's rounding depends on how it was compiled).

**How** (no value is held by the engine beyond one group per cell, and few come back):

1. The range [min, max] is cut into ``GRID`` equal cells (``floor((v/4 - min/4) * scale)``: monotone in v, so
   each cell holds a run of the sorted values). One ``GROUP BY`` counts the rows of every cell with their min
   and max, and a running sum over the cells (a window) keeps only the cells that hold a wanted rank: a row per
   rank comes back (per rank and cell being cut, in a finer grid), with the count before it.
2. A cell whose min equals its max gives its ranks outright; one with at most ``FETCH_AT_MOST`` rows has its
   distinct values fetched, ordered, with their counts; a larger one is cut again by a grid ``GRID`` times
   finer, counted only within the cells being cut (up to ``GRIDS`` grids; past that the values are fetched).

Every query is a sqlglot expression, so the rounds run on any engine and are recorded by ``--save-counts``;
which cells each query asks about depends only on the previous rounds' answers.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable, Sequence

from sqlglot import exp

from stagewatch.data import aggregates as ag
from stagewatch.data.aggregates import Expr
from stagewatch.errors import StagewatchError

GRID = 1 << 12  # cells per grid: the engine holds at most this many groups (plus one) per cell being cut
FETCH_AT_MOST = 1024  # rows in a cell whose values are fetched rather than cut again
GRIDS = 4  # grids of 2^12, 2^24, 2^36 and 2^48 cells: floor() stays an exact integer in a DOUBLE and a BIGINT


def interpolate(low: float, high: float, g: float) -> float:
    """numpy's linear interpolation (``numpy.lib._function_base_impl._lerp``) in the same operations."""
    diff = high - low
    if g >= 0.5:
        return high - diff * (1 - g)
    return low + diff * g


def positions(n: int, p: float) -> tuple[int, int, float]:
    """The ranks (0-based) of the two order statistics the quantile at ``p`` of ``n`` values interpolates
    between, and the weight of the second, as ``numpy.quantile`` computes them."""
    h = (n - 1) * float(p)
    if h >= n - 1:
        return n - 1, n - 1, 0.0
    j = int(math.floor(h))
    return j, j + 1, h - j


@dataclass(frozen=True)
class Rows:
    """Where the values are: ``run(query)`` returns a query's rows; ``view`` is the log's view, ``where`` the
    period's condition, ``period`` its ends (for the engine's filter on the stored time column) and ``file``
    what to name in a message."""
    run: Callable[[Any], list[tuple[Any, ...]]]
    view: str
    where: Expr
    period: tuple[float | None, float | None]
    file: str

    def select(self, *items: Expr) -> Any:
        query = exp.select(*items).from_(exp.to_table(self.view))
        query.meta["period"] = self.period  # the scan's pushdown adds the stored time column's filter here
        return query


@dataclass(frozen=True)
class Cell:
    """A run of the sorted values: its cell number in each grid so far, the count of values before it, its
    count, min and max."""
    path: tuple[int, ...]
    before: int
    count: int
    low: float
    high: float


def _grids(value: Expr, low: float, high: float) -> list[Expr]:
    """Each grid's cell number of a value: ``floor((v/4 - low/4) * GRID^level / (high/4 - low/4))``. Quarters
    keep ``high - low`` finite over the whole DOUBLE range; any rounding keeps the expression monotone in v, and
    the same text gives the same cell in every query of an engine, which is all the method needs."""
    span = high * 0.25 - low * 0.25
    out: list[Expr] = []
    for level in range(1, GRIDS + 1):
        scale = float(GRID ** level) / span if span > 0 else math.inf
        if not math.isfinite(scale):
            break
        offset = exp.Sub(this=exp.Mul(this=value.copy(), expression=ag.lit(0.25)), expression=ag.lit(low * 0.25))
        out.append(exp.func("floor", exp.Mul(this=exp.paren(offset), expression=ag.lit(scale))))
    return out


def _in(cells: Expr, members: set[int]) -> Expr:
    return exp.In(this=cells.copy(), expressions=[exp.Literal.number(m) for m in sorted(members)])


def _base(value: Expr, where: Expr, grids: Sequence[Expr], parents: Sequence[tuple[int, ...]]) -> Expr:
    """Finite values in the period, within the parents' cells of the grids before the last."""
    parts = [where.copy(), ag.finite(value)]
    for i in range(len(grids) - 1):
        parts.append(_in(grids[i], {p[i] for p in parents}))
    return exp.and_(*parts)


def _names(level: int) -> list[str]:
    return [f"g{i + 1}" for i in range(level)]


def _runs(offsets: set[int]) -> list[tuple[int, int]]:
    """Consecutive offsets as (first, last) runs: the two ranks a quantile interpolates between are one run."""
    out: list[tuple[int, int]] = []
    for o in sorted(offsets):
        if out and o == out[-1][1] + 1:
            out[-1] = (out[-1][0], o)
        else:
            out.append((o, o))
    return out


def _split_query(rows: Rows, value: Expr, grids: Sequence[Expr], wanted: dict[tuple[int, ...], set[int]]) -> Expr:
    """Counts of the cells of the last grid within the parents (``wanted``: parent path to the offsets of the
    ranks sought within it), only the cells holding one of the offsets sought (in any parent)."""
    names = _names(len(grids))
    inner = rows.select(*[exp.alias_(g.copy(), name) for g, name in zip(grids, names)],
                        exp.alias_(ag.rows(), "n"), exp.alias_(exp.func("min", value.copy()), "low"),
                        exp.alias_(exp.func("max", value.copy()), "high"))
    inner = inner.where(_base(value, rows.where, grids, list(wanted))).group_by(
        *[exp.Literal.number(i + 1) for i in range(len(names))])
    running = exp.Window(this=exp.Sum(this=exp.column("n")),
                         partition_by=[exp.column(name) for name in names[:-1]] or None,
                         order=exp.Order(expressions=[exp.Ordered(this=exp.column(names[-1]))]),
                         spec=exp.WindowSpec(kind="ROWS", start="UNBOUNDED", start_side="PRECEDING",
                                             end="CURRENT ROW"))
    counted = exp.select(*[exp.column(c) for c in [*names, "n", "low", "high"]],
                         exp.alias_(running, "upto")).from_(inner.subquery("cells"))
    # Only the offsets, not the parents: an equality on a parent's cell would be pushed into the scan and
    # computed for every row. Each parent's cells holding any of the offsets come back; the caller keeps its own.
    offsets = set().union(*wanted.values())
    holds = [exp.and_(exp.LTE(this=exp.column("upto") - exp.column("n"), expression=exp.Literal.number(last)),
                      exp.GT(this=exp.column("upto"), expression=exp.Literal.number(first)))
             for first, last in _runs(offsets)]  # a cell holds one of first..last
    return (exp.select(*[exp.column(c) for c in [*names, "n", "low", "high", "upto"]])
            .from_(counted.subquery("counted")).where(exp.or_(*holds))
            .order_by(*[exp.Literal.number(i + 1) for i in range(len(names))]))


def _fetch_query(rows: Rows, value: Expr, grids: Sequence[Expr], cells: Sequence[Cell]) -> Expr:
    """The distinct values of the cells, with their counts, ordered (cell numbers first, to tell them apart)."""
    names = _names(len(grids))
    parts = [rows.where.copy(), ag.finite(value)]
    parts += [_in(grids[i], {c.path[i] for c in cells}) for i in range(len(grids))]
    items = [*[exp.alias_(g.copy(), name) for g, name in zip(grids, names)], exp.alias_(value.copy(), "v"),
             exp.alias_(ag.rows(), "n")]
    order = [exp.Literal.number(i + 1) for i in range(len(names) + 1)]
    return rows.select(*items).where(exp.and_(*parts)).group_by(*order).order_by(*order)


def order_statistics(rows: Rows, value: Expr, ranks: Sequence[int], n: int, low: float,
                     high: float) -> dict[int, float]:
    """The values at ``ranks`` (0-based) among the ``n`` finite values of ``value`` in the period, whose min
    and max are ``low`` and ``high``."""
    found: dict[int, float] = {}
    if low == high:
        return {k: float(low) + 0.0 for k in ranks}
    grids = _grids(value, low, high)
    pending = {k: Cell((), 0, n, low, high) for k in ranks}
    fetch: dict[int, Cell] = {}
    level = 0
    while pending:
        if level == len(grids):
            fetch.update(pending)
            break
        level += 1
        wanted: dict[tuple[int, ...], set[int]] = {}
        for k, cell in pending.items():
            wanted.setdefault(cell.path, set()).add(k - cell.before)
        found_rows = rows.run(_split_query(rows, value, grids[:level], wanted))
        children = [(tuple(int(g) for g in row[:level]), int(row[level]), float(row[level + 1]),
                     float(row[level + 2]), int(row[level + 3])) for row in found_rows]
        again: dict[int, Cell] = {}
        for k, parent in pending.items():
            o = k - parent.before
            child = next((c for c in children if c[0][:-1] == parent.path and c[4] - c[1] <= o < c[4]), None)
            if child is None:
                raise _inconsistent(rows.file)
            path, count, lo, hi, upto = child
            cell = Cell(path, parent.before + upto - count, count, lo, hi)
            if lo == hi:
                found[k] = lo + 0.0
            elif count <= FETCH_AT_MOST:
                fetch[k] = cell
            else:
                again[k] = cell
        pending = again
    by_depth: dict[int, list[Cell]] = {}
    for cell in fetch.values():
        by_depth.setdefault(len(cell.path), []).append(cell)
    values: dict[tuple[int, ...], list[tuple[float, int]]] = {}
    for depth, cells in by_depth.items():
        wanted_paths = {c.path for c in cells}
        for row in rows.run(_fetch_query(rows, value, grids[:depth], cells)):
            path = tuple(int(g) for g in row[:depth])
            if path in wanted_paths:
                values.setdefault(path, []).append((float(row[depth]), int(row[depth + 1])))
    for k, cell in fetch.items():
        o, seen = k - cell.before, 0
        for v, count in sorted(values.get(cell.path, [])):
            seen += count
            if o < seen:
                found[k] = v + 0.0  # -0.0 equals 0.0: which of them an engine's MIN or GROUP BY returns varies
                break
        else:
            raise _inconsistent(rows.file)
    return found


def _inconsistent(file: str) -> StagewatchError:
    return StagewatchError("the counts of a quantile query do not add up to the rows counted before", file=file,
                           expected="the counts of one run of calibrate (saved with --save-counts), unedited")


def exact(rows: Rows, value: Expr, probs: Sequence[float], n: int, low: float | None,
          high: float | None) -> list[float]:
    """The quantiles at ``probs`` (the module's definition) of the finite values of ``value`` in the period."""
    if n == 0 or low is None or high is None or not probs:
        return []
    spots = [positions(n, p) for p in probs]
    ranks = sorted({k for j, j1, _ in spots for k in (j, j1)})
    x = order_statistics(rows, value, ranks, n, float(low), float(high))
    return [interpolate(x[j], x[j1], g) for j, j1, g in spots]
