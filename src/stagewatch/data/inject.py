"""Injected changes for replay: ``STAGE.COLUMN=KIND:SIZE@T`` applied to a stage's log from time T on.

Kinds: ``shift`` (add SIZE reference standard deviations), ``scale`` (stretch deviations from the reference mean
by SIZE), ``swap`` (SIZE is ``a/b``: the two categories trade places), ``missing`` (a share SIZE of rows lose the
value), ``volume`` (a share SIZE of rows disappear). Rows are picked by a number drawn from their timestamp in
integer arithmetic that every engine computes alike (:func:`draw`), so a replay is repeatable and picks the same
rows on DuckDB and on Spark. The change is a view over the log; the files are never touched.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

from sqlglot import exp

from stagewatch.data import aggregates as ag
from stagewatch.data.aggregates import Expr
from stagewatch.data.sources import TS, Source, parse_time
from stagewatch.errors import StagewatchError

KINDS = ("shift", "scale", "swap", "missing", "volume")
_FORM = re.compile(r"^(?P<stage>[^.=]+)\.(?P<column>[^=]+)=(?P<kind>[a-z]+):(?P<size>[^@]+)@(?P<at>.+)$")


@dataclass(frozen=True)
class Injection:
    stage: str
    column: str
    kind: str
    size: str
    at: float
    text: str

    @property
    def number(self) -> float:
        return float(self.size)


def sizes(text: str) -> list[str]:
    """One change per size when SIZE lists several (``shift:0.5,1,2@T``): a detection-delay table by size."""
    match = _FORM.match(text.strip())
    if not match or "," not in match["size"]:
        return [text]
    head, tail = text.split("=", 1)
    kind, rest = tail.split(":", 1)
    size, at = rest.split("@", 1)
    return [f"{head}={kind}:{s.strip()}@{at}" for s in size.split(",") if s.strip()]


def parse(text: str) -> Injection:
    match = _FORM.match(text.strip())
    expected = "STAGE.COLUMN=KIND:SIZE@T, e.g. load_cell.weight_g=shift:1.5@2026-11-05T06:00Z (kinds: " + \
        ", ".join(KINDS) + ")"
    if not match:
        raise StagewatchError(f"--inject {text!r} is not a change", expected=expected)
    kind = match["kind"]
    if kind not in KINDS:
        raise StagewatchError(f"--inject: unknown kind '{kind}'", expected=expected)
    size = match["size"]
    if kind == "swap":
        if size.count("/") != 1:
            raise StagewatchError(f"--inject: swap needs two categories, got {size!r}", expected="swap:a/b")
    else:
        try:
            value = float(size)
        except ValueError:
            raise StagewatchError(f"--inject: size {size!r} is not a number", expected=expected) from None
        if kind in ("missing", "volume") and not 0 < value <= 1:
            raise StagewatchError(f"--inject: a {kind} share must be in (0, 1], got {value}", expected=expected)
    at = parse_time(match["at"], "--inject")
    assert at is not None
    return Injection(match["stage"], match["column"], kind, size, at, text)


PRIME = 2147483647  # 2^31 - 1: every product below stays under 2^63, so no engine overflows
_MIX = (48271, 1013904223)


def draw() -> exp.Expression:
    """A repeatable number in [0, 1) per row, from its timestamp: the whole microseconds ``u`` since the epoch,
    ``x = u mod p`` (made non-negative), then ``x = (x * 48271) mod p``, ``x = (x * x + 1013904223) mod p`` (the
    square makes the steps non-linear, so rows close in time do not get draws in step) and ``x / p``, p = 2^31 - 1.
    BIGINT arithmetic and one division: the same number on every engine (:func:`draw_of` is the same in Python)."""
    micros = exp.cast(exp.func("round", exp.Mul(this=exp.column(TS), expression=exp.Literal.number(1000000))),
                      "BIGINT")
    p = exp.Literal.number(PRIME)

    def mod(x: Expr) -> Expr:
        return exp.paren(exp.Mod(this=exp.paren(x), expression=p.copy()))

    x = mod(exp.Add(this=mod(micros), expression=p.copy()))
    x = mod(exp.Mul(this=x, expression=exp.Literal.number(_MIX[0])))
    x = mod(exp.Add(this=exp.Mul(this=x, expression=x.copy()), expression=exp.Literal.number(_MIX[1])))
    return exp.Div(this=exp.cast(x, "DOUBLE"), expression=exp.cast(p.copy(), "DOUBLE"))


def draw_of(micros: int) -> float:
    """:func:`draw` for a timestamp of ``micros`` microseconds since the epoch, in Python."""
    x = ((micros % PRIME) + PRIME) % PRIME  # Python's % is already non-negative: the same number
    x = (x * _MIX[0]) % PRIME
    x = (x * x + _MIX[1]) % PRIME
    return x / PRIME


def apply(engine: Any, source: Source, injection: Injection, reference: dict[str, Any]) -> Source:
    """A new view of ``source`` with the change applied; ``reference`` is the baseline's summary of the column."""
    if injection.kind != "volume" and not source.has(injection.column):
        raise StagewatchError(f"--inject: the log of {source.stage} has no column '{injection.column}'",
                              file=source.pattern)
    after = exp.GTE(this=exp.column(TS), expression=ag.lit(injection.at))
    value = ag.number(injection.column) if injection.kind in ("shift", "scale") else ag.col(injection.column)
    where = None
    changed: Expr | None = None
    if injection.kind in ("shift", "scale"):
        mean, sd = reference.get("mean"), reference.get("sd")
        if mean is None or not sd:
            raise StagewatchError(f"--inject: the baseline has no mean and spread for {injection.stage}."
                                  f"{injection.column}", expected="a numeric column that a check of the plan reads")
        if injection.kind == "shift":
            changed = exp.Add(this=value, expression=ag.lit(injection.number * float(sd)))
        else:
            changed = exp.Add(this=ag.lit(float(mean)), expression=exp.Mul(
                this=exp.paren(exp.Sub(this=value, expression=ag.lit(float(mean)))), expression=ag.lit(injection.number)))
    elif injection.kind == "swap":
        a, b = injection.size.split("/")
        text = ag.text(injection.column)
        changed = exp.Case(ifs=[exp.If(this=exp.EQ(this=text.copy(), expression=ag.lit(a)), true=ag.lit(b)),
                                exp.If(this=exp.EQ(this=text.copy(), expression=ag.lit(b)), true=ag.lit(a))],
                           default=text.copy())
    elif injection.kind == "missing":
        changed = exp.Case(ifs=[exp.If(this=exp.LT(this=draw(), expression=ag.lit(injection.number)),
                                       true=exp.null())], default=value)
    else:
        where = exp.not_(exp.and_(after.copy(), exp.LT(this=draw(), expression=ag.lit(injection.number))))
    # every column by name (``SELECT * REPLACE`` is DuckDB's own), the changed one replaced
    items: list[Expr] = [exp.alias_(exp.Case(ifs=[exp.If(this=after.copy(), true=changed)],
                                             default=ag.col(name)), name, quoted=True)
                         if changed is not None and name == injection.column else ag.col(name)
                         for name in source.columns]
    query = exp.select(*items, exp.column(TS)).from_(exp.to_table(source.view))
    if where is not None:
        query = query.where(where)
    view = source.view + "_changed"
    engine.define(view, query)
    return Source(stage=source.stage, pattern=source.pattern, paths=source.paths, view=view,
                  columns=source.columns, time_column=source.time_column, files=source.files)
