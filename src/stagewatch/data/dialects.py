"""The aggregate expressions in each SQL dialect: one tree, rendered by sqlglot, with the few functions no
dialect shares mapped here.

Everything else in a query is portable by construction (:mod:`stagewatch.data.aggregates`): finiteness is
``v - v = 0`` (false for NaN and infinity under both IEEE comparison and the "NaN is largest" ordering of DuckDB,
Spark, PostgreSQL and Snowflake), out of range is ``NOT (v >= lo AND v <= hi)``, and counts are sums of
``CASE WHEN``. What differs per dialect: microseconds since the epoch of a timestamp (``EPOCH_US`` in the tree).
Calibrate's exact quantiles need no function of their own: they come from grouped counts
(:mod:`stagewatch.data.quantiles`).
"""

from __future__ import annotations

import hashlib
from typing import Any

from sqlglot import exp

from stagewatch.data import DIALECTS  # noqa: F401  (named there, so that the command line needs no sqlglot)
from stagewatch.errors import StagewatchError

EPOCH_US = "STAGEWATCH_EPOCH_US"  # placeholder function: microseconds since the epoch of a timestamp


def epoch_us(stamp: Any) -> exp.Expression:
    return exp.Anonymous(this=EPOCH_US, expressions=[stamp])


def _epoch_us(stamp: Any, dialect: str) -> exp.Expression:
    if dialect == "duckdb":
        return exp.Anonymous(this="epoch_us", expressions=[stamp])
    if dialect == "spark":
        return exp.Anonymous(this="unix_micros", expressions=[stamp])
    if dialect == "bigquery":
        return exp.Anonymous(this="UNIX_MICROS", expressions=[stamp])
    if dialect == "snowflake":
        return exp.Anonymous(this="DATE_PART", expressions=[exp.var("EPOCH_MICROSECOND"), stamp])
    if dialect == "trino":
        return exp.Mul(this=exp.Anonymous(this="to_unixtime", expressions=[stamp]),
                       expression=exp.Literal.number(1000000))
    if dialect == "postgres":
        return exp.Mul(this=exp.Extract(this=exp.var("EPOCH"), expression=stamp),
                       expression=exp.Literal.number(1000000))
    raise ValueError(dialect)


def _rewrite(dialect: str, node: exp.Expression) -> exp.Expression:
    if isinstance(node, exp.Anonymous) and str(node.this).upper() == EPOCH_US:
        return _epoch_us(node.expressions[0], dialect)
    if isinstance(node, exp.TryCast) and dialect == "spark":  # TRY_CAST, not CAST: ANSI mode would fail on text
        node.set("safe", True)
    return node


def render(expression: Any, dialect: str = "duckdb") -> str:
    """The SQL text of ``expression`` in ``dialect``; identifiers and literals are quoted by sqlglot."""
    if dialect not in DIALECTS:
        raise StagewatchError(f"unknown SQL dialect {dialect!r}", expected=", ".join(DIALECTS))
    tree = expression.copy().transform(lambda node: _rewrite(dialect, node))
    return tree.sql(dialect=dialect)


def table_name(text: str, option: str = "--table") -> exp.Table:
    """``db.table`` (or ``catalog.db.table``) as a table whose every part is a quoted identifier."""
    parts = text.split(".")
    if not 1 <= len(parts) <= 3 or not all(parts):
        raise StagewatchError(f"{option} {text!r} is not a table name",
                              expected="TABLE, DB.TABLE or CATALOG.DB.TABLE")
    names = [exp.to_identifier(p, quoted=True) for p in parts]
    return exp.Table(this=names[-1], db=names[-2] if len(names) > 1 else None,
                     catalog=names[-3] if len(names) > 2 else None)


def query_id(stage: str, query: Any) -> str:
    """A query's identity, whatever table it reads: the stage and the query's DuckDB text with every table named
    ``log``. Counts fed back with ``--counts`` are matched to the query that asked for them by it."""
    neutral = query.copy().transform(
        lambda n: exp.Table(this=exp.to_identifier("log")) if isinstance(n, exp.Table) else n)
    digest = hashlib.sha256(f"{stage}\x00{render(neutral)}".encode()).hexdigest()
    return "q" + digest[:20]


def output_names(query: Any) -> list[str]:
    """The names of a query's result columns (every item of our queries has an alias)."""
    return [item.alias_or_name.lower() for item in query.expressions]
