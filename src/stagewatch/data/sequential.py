"""The sequential option of a share check: a Bernoulli CUSUM next to the window rule.

A reviewer adds ``sequential: {method: cusum, shift: 2}`` to a share metric (label-based quality, a slow share).
The CUSUM accumulates evidence item by item (grouped by time bucket) for a move from the reference share p0 to
``shift`` x p0, and alarms at a limit h set so that its in-control run length, in items, spends the check's share
of the budget: ARL0 = items per week / (alpha x evaluations per week), both from the plan's sizing block.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from stagewatch import cusum

DEFAULT_SHIFT = 2.0
HOURS_PER_WEEK = 168.0


@dataclass(frozen=True)
class Cusum:
    p0: float
    p1: float
    h: float
    arl0_items: float
    items_per_week: float

    def words(self) -> str:
        return (f"CUSUM for a share moving from {self.p0:.3g} to {self.p1:.3g}; limit {self.h:.3g} (in control, one "
                f"alarm every {self.arl0_items:,.0f} items, about {self.arl0_items / self.items_per_week:.3g} weeks)")


def setup(metric: dict[str, Any], ref: dict[str, Any], stage_ref: dict[str, Any]) -> Cusum | None:
    """The CUSUM of a metric that asks for one, from its reference and its budget share; None otherwise."""
    option = metric.get("sequential")
    if not option or metric["statistic"] not in ("proportion", "quantile") or not ref.get("n"):
        return None
    sizing = metric.get("sizing") or {}
    from stagewatch.sizing import number

    alpha = number(sizing["alpha"]) if sizing.get("alpha") is not None else None
    evaluations = sizing.get("evaluations_per_week")
    hours = stage_ref.get("hours") or 0
    if not alpha or not evaluations or not hours:
        return None
    p0 = min(max(ref["share"], 1.0 / ref["n"]), 0.5)
    p1 = min(p0 * float(option.get("shift", DEFAULT_SHIFT)), 0.99)
    items_per_week = ref["n"] / hours * HOURS_PER_WEEK
    arl0 = items_per_week / (float(alpha) * float(evaluations))
    return Cusum(p0, p1, cusum.bernoulli_cusum_limit(p0, p1, arl0), arl0, items_per_week)
