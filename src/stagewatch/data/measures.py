"""Per check: the counts it needs (as aggregates), its reference from a baseline's counts, and its value.

A :class:`Measure` is built from one plan metric. ``profile()`` lists what calibrating needs to know first
(quantiles, category frequencies, mean and spread); ``reference(profile)`` fixes edges and categories;
``aggregates(reference)`` are the counts the scan computes, the same in calibrate and check, so the
reference counts and the window counts are taken with one definition; ``evaluate(reference, counts)`` turns the
window's counts into the statistic with the functions of :mod:`stagewatch.stats`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlglot import exp

from stagewatch import binned
from stagewatch.data import aggregates as ag
from stagewatch.data.aggregates import Expr

KS_BINS = 100  # reference-quantile bins for a binned KS: binning error at most ~0.01 (binned.ks_binning_error)
MAX_CATEGORIES_SEEN = 1000  # categories remembered per column for the "unseen" check
DISTRIBUTIONS = ("psi", "ks", "chi_square", "mean")


@dataclass
class Evaluation:
    value: float | None
    n: int
    m: int | None
    words: str
    detail: dict[str, Any]


class NotMeasurable(Exception):
    """The check cannot be computed from this log (a column is absent); the message says which."""


def _pct(x: float) -> str:
    return f"{100 * x:.3g}%"


def _num(x: float) -> str:
    return f"{x:.4g}"


class Measure:
    def __init__(self, metric: dict[str, Any], numeric_columns: set[str] | None = None) -> None:
        self.metric = metric
        self.reads: dict[str, Any] = metric["reads"]
        self.statistic: str = metric["statistic"]
        self.params: dict[str, Any] = metric.get("params") or {}
        self.condition: str | None = self.reads.get("condition")
        self.column: str | None = self.reads.get("column")
        self.numeric_columns = numeric_columns or set()

    # --- what the check reads ---------------------------------------------------------------------------
    def columns(self) -> list[str]:
        from stagewatch.data.contract import columns_of

        return columns_of(self.reads)

    def value_expr(self) -> exp.Expression:
        assert self.column is not None
        transform = self.reads.get("transform")
        if transform in ag.ERRORS:
            other = self.reads["other_column"]
            return ag.error(transform, self.column, other, self.column in self.numeric_columns,
                            other in self.numeric_columns)
        return ag.number(self.column, transform, self.column in self.numeric_columns)

    def is_categorical(self) -> bool:
        return self.statistic == "chi_square" or self.condition == "unseen"

    def quantile_level(self) -> float:
        q = float(self.params.get("q", 0.95))
        return 1 - q if self.condition == "below_quantile" else q

    # --- calibrate, pass 1 ----------------------------------------------------------------------------------
    def probabilities(self) -> list[float]:
        """Quantile levels the reference needs for edges (empty when it needs none)."""
        if self.statistic == "psi":
            bins = int(self.params.get("bins", 10))
            return [i / bins for i in range(1, bins)]
        if self.statistic == "ks":
            return [i / KS_BINS for i in range(1, KS_BINS)]
        if self.condition in ("above_quantile", "below_quantile"):
            return [self.quantile_level()]
        return []

    def reference(self, profile: dict[str, Any]) -> dict[str, Any]:
        """Edges, categories or moments from the profile of the reference data (before counting)."""
        if self.statistic in ("psi", "ks"):
            edges = sorted(set(float(e) for e in profile["quantiles"] if e is not None and math.isfinite(e)))
            return {"edges": edges}  # ties merge bins: every bin keeps some reference mass
        if self.condition in ("above_quantile", "below_quantile"):
            return {"edge": float(profile["quantiles"][0])}
        if self.statistic == "chi_square":
            top = [c for c, _ in profile["categories"]][: int(self.params.get("categories", 10)) - 1]
            return {"categories": top}
        if self.condition == "unseen":
            return {"categories_seen": [c for c, _ in profile["categories"]][:MAX_CATEGORIES_SEEN]}
        if self.statistic == "mean":
            return {"mean": profile["mean"], "sd": profile["sd"]}
        return {}

    # --- counts ------------------------------------------------------------------------------------------
    def _condition(self, ref: dict[str, Any]) -> tuple[Expr, Expr | None]:
        """(the rows counted, the rows that form the denominator; None: every row)."""
        c = self.condition
        if c in ("missing",):
            return ag.col(self.column).is_(exp.null()), None  # type: ignore[arg-type]
        if c == "out_of_range":
            lo, hi = self.reads["range"]
            return ag.outside(self.value_expr(), lo, hi), None
        if c == "unknown":
            return exp.EQ(this=ag.text(self.column), expression=ag.lit(self.reads.get("unknown_value", "unknown"))), None  # type: ignore[arg-type]
        if c == "unseen":
            seen = ref.get("categories_seen", [])
            v = ag.text(self.column)  # type: ignore[arg-type]
            known = exp.In(this=v.copy(), expressions=[ag.lit(s) for s in seen]) if seen else exp.false()
            return exp.and_(v.copy().is_(exp.null()).not_(), exp.not_(known)), None
        if c == "empty":
            v = ag.text(self.column)  # type: ignore[arg-type]
            return exp.or_(v.copy().is_(exp.null()), exp.EQ(this=exp.Trim(this=v.copy()), expression=ag.lit(""))), None
        if c == "set":
            return ag.flag_set(self.column), None  # type: ignore[arg-type]
        if c == "nonfinite":
            if self.column not in self.numeric_columns:
                return exp.false(), None
            v = self.value_expr()
            return exp.and_(v.copy().is_(exp.null()).not_(), exp.not_(ag.finite(v.copy()))), None
        if c == "invalid":
            ranges = self.reads.get("ranges", {})
            bad = []
            for name in self.reads.get("columns", []):
                if name in ranges:
                    v = ag.number(name, None, name in self.numeric_columns)
                    lo, hi = ranges[name]
                    bad.append(exp.or_(exp.not_(ag.finite(v)), exp.LT(this=v.copy(), expression=ag.lit(float(lo))),
                                       exp.GT(this=v.copy(), expression=ag.lit(float(hi)))))
                else:
                    bad.append(ag.col(name).is_(exp.null()))
            return exp.or_(*bad) if bad else exp.false(), None
        if c in ("disagrees", "agrees"):
            a, b = self.column, self.reads["other_column"]
            both = exp.and_(ag.col(a).is_(exp.null()).not_(), ag.col(b).is_(exp.null()).not_())  # type: ignore[arg-type]
            if a in self.numeric_columns:  # a score against a label on the same scale: wrong side of 0.5
                differ: Expr = exp.GTE(this=exp.Abs(this=exp.paren(exp.Sub(this=ag.number(a, None, True),  # type: ignore[arg-type]
                                                                            expression=ag.number(b, None, b in self.numeric_columns)))),
                                                 expression=ag.lit(0.5))
            else:
                differ = exp.NEQ(this=ag.text(a), expression=ag.text(b))  # type: ignore[arg-type]
            hit = differ if c == "disagrees" else exp.not_(differ)
            return exp.and_(both.copy(), hit), both
        if c in ("above_quantile", "below_quantile"):
            v = self.value_expr()
            edge = ag.lit(float(ref["edge"]))
            beyond = exp.GT(this=v.copy(), expression=edge) if c == "above_quantile" else exp.LT(this=v.copy(), expression=edge)
            return exp.and_(ag.finite(v), beyond), ag.finite(v.copy())
        raise ValueError(f"no condition {c!r}")

    def aggregates(self, ref: dict[str, Any]) -> list[ag.Aggregate]:
        if self.statistic in ("psi", "ks"):
            return ag.bins(self.value_expr(), ref["edges"])
        if self.statistic == "chi_square":
            return ag.categories(ag.text(self.column), ref["categories"])  # type: ignore[arg-type]
        if self.statistic == "mean":
            v = self.value_expr()
            fin = ag.finite(v)
            val = exp.Case(ifs=[exp.If(this=fin, true=v.copy())])
            return [ag.Aggregate("n", exp.Count(this=val.copy())), ag.Aggregate("sum", exp.func("sum", val.copy())),
                    ag.Aggregate("sumsq", exp.func("sum", exp.Mul(this=val.copy(), expression=val.copy())))]
        if self.statistic == "count" or self.condition == "rows":
            return [ag.Aggregate("n", ag.rows())]
        hit, base = self._condition(ref)
        return [ag.Aggregate("matches", ag.count_if(hit)),
                ag.Aggregate("n", ag.rows() if base is None else ag.count_if(base))]

    # --- value ---------------------------------------------------------------------------------------------
    def _matrix(self, counts: dict[str, Any], prefix: str) -> np.ndarray:
        keys = sorted((k for k in counts if k.startswith(prefix)), key=lambda k: int(k[len(prefix):]))
        return np.column_stack([np.atleast_1d(np.asarray(counts[k], dtype=float)) for k in keys])

    def values(self, ref: dict[str, Any], counts: dict[str, Any], expected: Any = None
               ) -> tuple[np.ndarray, np.ndarray, int | None]:
        """The statistic for many windows at once: (value per window, NaN where undefined; samples n; m).

        ``counts`` maps each aggregate key to an array over windows (or a number for one window).
        """
        s = self.statistic
        if s in ("psi", "ks", "chi_square"):
            win = self._matrix(counts, "cat" if s == "chi_square" else "bin")
            rc = np.asarray(ref["counts"], dtype=float)
            n = win.sum(axis=1)
            fn = {"psi": binned.psi_many, "ks": binned.ks_many, "chi_square": binned.effect_size_w_many}[s]
            with np.errstate(divide="ignore", invalid="ignore"):
                value = np.where(n > 0, fn(rc, win), np.nan)
            return value, n, int(rc.sum())
        if s == "mean":
            n = np.atleast_1d(np.asarray(counts["n"], dtype=float))
            sd = ref.get("sd")
            with np.errstate(divide="ignore", invalid="ignore"):
                mean = np.atleast_1d(np.asarray(counts["sum"], dtype=float)) / n
                value = (mean - ref["mean"]) / sd if sd and math.isfinite(sd) and sd > 0 else mean * np.nan
            return np.where(n > 0, value, np.nan), n, ref.get("n")
        if s == "count":
            n = np.atleast_1d(np.asarray(counts["n"], dtype=float))
            exp_ = np.atleast_1d(np.asarray(np.nan if expected is None else expected, dtype=float))
            with np.errstate(divide="ignore", invalid="ignore"):
                value = np.where(exp_ > 0, n / exp_ - 1, np.nan)
            return value, np.round(np.nan_to_num(exp_)), None
        matches = np.atleast_1d(np.asarray(counts["matches"], dtype=float))
        n = np.atleast_1d(np.asarray(counts["n"], dtype=float))
        if s == "level":
            return matches, n, None
        with np.errstate(divide="ignore", invalid="ignore"):
            value = np.where(n > 0, matches / n - ref["share"], np.nan)
        return value, n, ref.get("n")

    def evaluate(self, ref: dict[str, Any], counts: dict[str, float], expected: float | None = None) -> Evaluation:
        """One window: the value, its samples and the change in words."""
        values, ns, m = self.values(ref, counts, expected)
        raw, n = float(values[0]), int(ns[0])
        value = None if math.isnan(raw) else raw
        s = self.statistic
        if value is None:
            why = {"count": "no reference rate for this time", "mean": "no values in the window"}.get(
                s, "no values in the window" if s in DISTRIBUTIONS else "no rows the share applies to")
            return Evaluation(None, n, m, why, {})
        if s in ("psi", "ks", "chi_square"):
            win = self._matrix(counts, "cat" if s == "chi_square" else "bin")[0]
            rc = np.asarray(ref["counts"], dtype=float)
            where = ({"categories": [*ref["categories"], "other"]} if s == "chi_square"
                     else {"edges": [float(e) for e in ref["edges"]]})
            return Evaluation(value, n, m, self._distribution_words(ref, rc, win), {
                "reference_counts": rc.astype(int).tolist(), "window_counts": win.astype(int).tolist(), **where})
        if s == "mean":
            mean = counts["sum"] / counts["n"]
            return Evaluation(value, n, m, f"mean {_num(mean)} against {_num(ref['mean'])} in the reference "
                              f"({value:+.2f} reference SD)", {"mean": mean, "reference_mean": ref["mean"],
                                                               "reference_sd": ref["sd"]})
        if s == "count":
            rows = int(counts["n"])
            return Evaluation(value, n, None, f"{rows:,} rows against {expected:,.0f} expected ({value:+.0%})",
                              {"expected": expected, "rows": rows})
        matches = int(counts["matches"])
        if s == "level":
            return Evaluation(value, n, None, f"{matches:,} of {n:,} rows", {})
        share = matches / n
        return Evaluation(value, n, m, f"share {_pct(share)} against {_pct(ref['share'])} in the reference",
                          {"share": share, "reference_share": ref["share"], "matches": matches})

    def reference_from_counts(self, ref: dict[str, Any], counts: dict[str, float]) -> dict[str, Any]:
        """The reference block a baseline stores: edges or categories plus the reference's own counts."""
        s = self.statistic
        out = dict(ref)
        if s in ("psi", "ks", "chi_square"):
            prefix = "cat" if s == "chi_square" else "bin"
            keys = sorted((k for k in counts if k.startswith(prefix)), key=lambda k: int(k[len(prefix):]))
            out["counts"] = [int(counts[k]) for k in keys]
        elif s == "mean":
            out["n"] = int(counts["n"])
        elif s not in ("count", "level"):
            out["n"] = int(counts["n"])
            out["matches"] = int(counts["matches"])
            out["share"] = counts["matches"] / counts["n"] if counts["n"] else 0.0
        return out

    def _distribution_words(self, ref: dict[str, Any], rc: np.ndarray, win: np.ndarray) -> str:
        r = rc / rc.sum()
        w = win / win.sum()
        i = int(np.argmax(np.abs(w - r)))
        if self.statistic == "chi_square":
            names = [*ref["categories"], "other"]
            label = f"'{names[i]}'"
        elif self.statistic == "ks":
            cr, cw = np.cumsum(r), np.cumsum(w)
            j = int(np.argmax(np.abs(cw - cr)))
            edges = ref["edges"]
            at = edges[j] if j < len(edges) else edges[-1] if edges else float("nan")
            return f"share below {_num(at)}: {_pct(cw[j])} against {_pct(cr[j])} in the reference"
        else:
            edges = ref["edges"]
            lo = "-inf" if i == 0 else _num(edges[i - 1])
            hi = "inf" if i >= len(edges) else _num(edges[i])
            label = f"[{lo}, {hi})"
        return f"{label} holds {_pct(w[i])} of the window against {_pct(r[i])} in the reference"
