"""One definition of the aggregates every engine computes, as sqlglot expressions.

A check needs counts: rows, rows that meet a condition, rows per bin of the reference's edges, rows per known
category, sums for a mean. Each is an :class:`Aggregate` with a stable key; the scan runs them all in one
``SELECT ... GROUP BY time bucket`` per stage. Bins are closed on the left: bin 0 holds values below the first
edge, bin i holds edge[i-1] <= v < edge[i], the last bin holds values at or above the last edge. NULL, NaN and
(for bins) infinite values fall in no bin. Column names and literals are quoted by sqlglot, never pasted.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any, Sequence

from sqlglot import exp

DIALECT = "duckdb"
# A sqlglot expression. sqlglot's typed classes (Func, Condition ...) do not all meet in one base class for mypy.
Expr = Any


@dataclass(frozen=True)
class Aggregate:
    """A count (or sum) with a stable key. A bin or category count also names its ``index``: an expression that
    gives each row its bin number (NULL: no bin) and this count's ``slot`` in it, so that the scan can count all
    bins of a column in one ``GROUP BY`` instead of one ``SUM(CASE ...)`` per bin; both mean the same rows."""

    key: str
    expr: Expr
    index: Expr | None = None
    slot: int = 0

    def renamed(self, key: str) -> "Aggregate":
        return replace(self, key=key)


def col(name: str) -> exp.Column:
    return exp.column(name, quoted=True)


def lit(value: Any) -> exp.Expression:
    if isinstance(value, bool):
        return exp.true() if value else exp.false()
    if isinstance(value, (int, float)):
        return exp.Literal.number(repr(float(value)) if isinstance(value, float) else value)
    return exp.Literal.string(str(value))


def number(name: str, transform: str | None = None, numeric: bool = False) -> exp.Expression:
    """A column as a DOUBLE (NULL where it is not a number); ``length``: its text length. A column known to hold
    numbers is a plain CAST (Snowflake's TRY_CAST takes only text); any other a TRY_CAST."""
    if transform == "length":
        return exp.Length(this=exp.cast(col(name), "VARCHAR"))
    if numeric:
        return exp.cast(col(name), "DOUBLE")
    return exp.TryCast(this=col(name), to=exp.DataType.build("DOUBLE"))


ERRORS = ("squared_error", "abs_error")


def error(kind: str, name: str, other: str, numeric: bool = False, other_numeric: bool = False) -> exp.Expression:
    """A prediction's error against its label, per row: (a - b) squared, or |a - b|; NULL where either is not a
    number (rows without a label)."""
    diff = exp.paren(exp.Sub(this=number(name, None, numeric), expression=number(other, None, other_numeric)))
    if kind == "squared_error":
        return exp.Mul(this=diff, expression=diff.copy())
    return exp.Abs(this=diff)


def text(name: str) -> exp.Expression:
    return exp.cast(col(name), "VARCHAR")


def finite(value: Expr) -> Expr:
    """``v - v = 0``: true for finite numbers only. NaN - NaN and inf - inf are NaN, which equals nothing under
    IEEE comparison and under the "NaN is largest" order (DuckDB, Spark, PostgreSQL, Snowflake); NULL is NULL."""
    return exp.and_(value.is_(exp.null()).not_(),
                    exp.EQ(this=exp.paren(exp.Sub(this=value.copy(), expression=value.copy())),
                           expression=exp.Literal.number(0)))


def outside(value: Expr, low: float, high: float) -> Expr:
    """A number that is not in [low, high]: below, above, or NaN (NaN is in no interval in any dialect)."""
    inside = exp.and_(exp.GTE(this=value.copy(), expression=lit(float(low))),
                      exp.LTE(this=value.copy(), expression=lit(float(high))))
    return exp.and_(value.copy().is_(exp.null()).not_(), exp.not_(exp.paren(inside)))


FLAG_TRUE = ("true", "t", "1", "yes", "y")


def flag_set(name: str) -> Expr:
    """A flag is set when its text, trimmed and in lower case, is one of :data:`FLAG_TRUE` (booleans and 0/1
    integers print as such in every dialect)."""
    value = exp.Lower(this=exp.Trim(this=text(name)))
    return exp.func("coalesce", exp.In(this=value, expressions=[lit(v) for v in FLAG_TRUE]), exp.false())


def count_if(condition: Expr) -> Expr:
    return exp.func("sum", exp.Case(ifs=[exp.If(this=condition, true=exp.Literal.number(1))],
                                    default=exp.Literal.number(0)))


def rows() -> exp.Expression:
    return exp.Count(this=exp.Star())


def bin_conditions(value: Expr, edges: Sequence[float]) -> list[Expr]:
    """One condition per bin of ``edges`` (len(edges) + 1 bins), finite values only."""
    ok = finite(value)
    out: list[Expr] = []
    bounds = [None, *edges, None]
    for low, high in zip(bounds[:-1], bounds[1:]):
        parts = [ok.copy()]
        if low is not None:
            parts.append(exp.GTE(this=value.copy(), expression=lit(float(low))))
        if high is not None:
            parts.append(exp.LT(this=value.copy(), expression=lit(float(high))))
        out.append(exp.and_(*parts))
    return out


def bin_index(value: Expr, edges: Sequence[float]) -> Expr:
    """The bin number of a finite value, by binary search over ``edges``: the number of edges at or below it
    (so bin i holds edge[i-1] <= v < edge[i], as :func:`bin_conditions`); NULL for NULL, NaN and infinity."""

    def search(lo: int, hi: int) -> Expr:  # the answer lies in lo .. hi
        if lo == hi:
            return exp.Literal.number(lo)
        mid = (lo + hi) // 2
        return exp.Case(ifs=[exp.If(this=exp.LT(this=value.copy(), expression=lit(float(edges[mid]))),
                                    true=search(lo, mid))], default=search(mid + 1, hi))

    return exp.Case(ifs=[exp.If(this=finite(value), true=search(0, len(edges)))])


def bins(value: Expr, edges: Sequence[float], prefix: str = "bin") -> list[Aggregate]:
    """One count per bin of ``edges``, counted together through :func:`bin_index`."""
    index = bin_index(value, edges)
    return [Aggregate(f"{prefix}{i}", count_if(c), index, i) for i, c in enumerate(bin_conditions(value, edges))]


def category_index(value: Expr, categories: Sequence[str]) -> Expr:
    """The slot of a value among ``categories``, the last slot for any other non-null value, NULL for NULL."""
    ifs = [exp.If(this=exp.EQ(this=value.copy(), expression=lit(c)), true=exp.Literal.number(i))
           for i, c in enumerate(categories)]
    ifs.append(exp.If(this=value.copy().is_(exp.null()).not_(), true=exp.Literal.number(len(categories))))
    return exp.Case(ifs=ifs)


def categories(value: Expr, known: Sequence[str], prefix: str = "cat") -> list[Aggregate]:
    """One count per known category and one for any other non-null value, counted together."""
    index = category_index(value, known)
    return [Aggregate(f"{prefix}{i}", count_if(c), index, i) for i, c in enumerate(category_conditions(value, known))]


def category_conditions(value: Expr, categories: Sequence[str]) -> list[Expr]:
    """One condition per known category, then one for any other non-null value."""
    out: list[Expr] = [exp.EQ(this=value.copy(), expression=lit(c)) for c in categories]
    known = exp.In(this=value.copy(), expressions=[lit(c) for c in categories]) if categories else exp.false()
    out.append(exp.and_(value.copy().is_(exp.null()).not_(), exp.not_(known)))
    return out


def select(view: str, aggregates: Sequence[Aggregate], *, bucket: Expr | None = None,
           where: Expr | None = None) -> exp.Select:
    """``SELECT [bucket,] agg AS a0, agg AS a1 ... FROM view [WHERE] [GROUP BY bucket]``."""
    items: list[Expr] = []
    if bucket is not None:
        items.append(exp.alias_(bucket, "bucket"))
    items.extend(exp.alias_(a.expr, f"a{i}") for i, a in enumerate(aggregates))
    query = exp.select(*items).from_(exp.to_table(view))
    if where is not None:
        query = query.where(where)
    if bucket is not None:  # by position: a log column named "bucket" must not take the alias's place
        query = query.group_by(exp.Literal.number(1))
    return query


def sql(expression: Expr, dialect: str = DIALECT) -> str:
    from stagewatch.data.dialects import render

    return render(expression, dialect)
