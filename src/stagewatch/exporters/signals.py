"""How each plan metric becomes Prometheus series, a PromQL value, and synthetic series for rule unit tests.

Every signal yields one value per check, with labels ``pipeline``, ``stage`` and ``check`` (the plan metric id),
recorded as ``stagewatch:check_value``; alerts compare that value with the plan's thresholds. Drift statistics are
sizes of change: shares and counts are recorded as signed changes against the reference, PSI and w as distances.

Where the reference comes from: a gauge (``stagewatch_reference_share``, ``stagewatch_reference_items_per_second``,
``stagewatch_reference_seconds``) published from calibrated reference data, never a 28-day range query in PromQL.
KS distances and mean shifts need the reference's full distribution or variance, so the data checks publish them as
``stagewatch_check_statistic``; PSI and category mixes are computed in PromQL from per-bin counters.
"""

from __future__ import annotations

import math
from functools import lru_cache
from dataclasses import dataclass, field
from typing import Any, ClassVar, Sequence

from stagewatch import durations
from stagewatch import binned

SMOOTH = 1e-4  # floor for reference shares of a category mix, so that the division by them stays finite
PSI_SMOOTHING = binned.PSI_SMOOTHING  # added to every bin count before PSI takes shares, as binned.psi does
# A guard only: smoothed reference shares are never 0, but a reference published unsmoothed would make ln() infinite.
# Far below any smoothed share of a realistic reference (0.5 / (items + 0.5 bins) reaches 1e-9 at 5e8 items).
PSI_REFERENCE_FLOOR = 1e-9
BINS_DEFAULT = 10


@dataclass(frozen=True)
class Family:
    name: str
    type: str  # counter | gauge | histogram
    labels: tuple[str, ...]
    help: str


FAMILIES = {
    "items": Family("stagewatch_check_items_total", "counter", ("pipeline", "stage", "check"),
                    "Items a check examined (the denominator of its share, or what a count check counts)."),
    "matches": Family("stagewatch_check_matches_total", "counter", ("pipeline", "stage", "check"),
                      "Items that met the check's condition (missing, unknown, out of range, passed, failed run ...)."),
    "bins": Family("stagewatch_check_bin_items_total", "counter", ("pipeline", "stage", "check", "bin"),
                   "Items per bin of a distribution check; bin edges come from the calibrated reference."),
    "ref_share": Family("stagewatch_reference_share", "gauge", ("pipeline", "stage", "check", "bin"),
                        "Reference share of a check (per bin for distribution checks; no bin label for shares)."),
    "ref_rate": Family("stagewatch_reference_items_per_second", "gauge", ("pipeline", "stage", "check"),
                       "Reference rate of a count check, items per second."),
    "ref_seconds": Family("stagewatch_reference_seconds", "gauge", ("pipeline", "stage", "check"),
                          "Reference duration of a check (median run or inference time), in seconds."),
    "statistic": Family("stagewatch_check_statistic", "gauge", ("pipeline", "stage", "check"),
                        "Statistic computed by `stagewatch check` on the latest window (KS distance, mean shift)."),
    "requests": Family("stagewatch_requests_total", "counter", ("pipeline", "stage"), "Requests served."),
    "errors": Family("stagewatch_request_errors_total", "counter", ("pipeline", "stage"), "Requests that failed."),
    "latency": Family("stagewatch_request_duration_seconds", "histogram", ("pipeline", "stage"),
                      "Request latency; needs a bucket boundary at the stage's latency SLO."),
    "saturation": Family("stagewatch_saturation_ratio", "gauge", ("pipeline", "stage"),
                         "Use of the busiest resource as a share of its capacity (0..1)."),
    "last_success": Family("stagewatch_last_success_timestamp_seconds", "gauge", ("pipeline", "stage"),
                           "Unix time of the last successful batch run."),
    "run_duration": Family("stagewatch_run_duration_seconds", "gauge", ("pipeline", "stage"),
                           "Duration of the last batch run."),
    "trained": Family("stagewatch_model_trained_timestamp_seconds", "gauge", ("pipeline", "stage"),
                      "Unix time at which the serving model was trained."),
    "inference": Family("stagewatch_inference_duration_seconds", "histogram", ("pipeline", "stage"),
                        "Inference time per item."),
    "level": Family("stagewatch_level", "gauge", ("pipeline", "stage", "check"),
                    "Level of a manual fixed-limit check, in the unit the plan states."),
}


def _sel(pipeline: str, stage: str, check: str | None = None) -> str:
    parts = [f'pipeline="{pipeline}"', f'stage="{stage}"']
    if check is not None:
        parts.append(f'check="{check}"')
    return "{" + ", ".join(parts) + "}"


@dataclass
class Series:
    """Synthetic input series for promtool: name{labels} -> list of values per step (None = gap)."""

    values: dict[str, list[float | None]] = field(default_factory=dict)

    def add(self, key: str, values: Sequence[float | None]) -> None:
        self.values[key] = list(values)


def counter(rates: list[float]) -> list[float]:
    """Cumulative counter values from increments per step (first sample 0)."""
    out, total = [0.0], 0.0
    for r in rates[1:]:
        total += r
        out.append(total)
    return out


@dataclass
class Signal:
    """Base: one value per check; subclasses say how to compute and how to simulate it."""

    metric: dict[str, Any]
    pipeline: str
    stage: str
    stage_info: dict[str, Any]
    level_reading: ClassVar[bool] = False  # True: thresholds are levels (fixed limits), False: sizes of change

    @property
    def check(self) -> str:
        return self.metric["id"]

    @property
    def window(self) -> str:
        return self.metric["window"]

    @property
    def check_labels(self) -> str:
        """The label matchers of this check's own series, as written in promtool series and selectors."""
        return f'pipeline="{self.pipeline}", stage="{self.stage}", check="{self.check}"'

    @property
    def for_(self) -> str:
        return "0s"

    def families(self) -> list[Family]:
        raise NotImplementedError

    def recording(self) -> list[dict[str, Any]]:
        return [{"record": "stagewatch:check_value", "expr": self.value_expr(), "labels": {"check": self.check}}]

    def value_expr(self) -> str:
        raise NotImplementedError

    def simulate(self, value: float | None, steps: int, start: int, step_s: int) -> Series:
        """Series whose recorded value is the normal value before ``start`` and ``value`` from then on."""
        raise NotImplementedError

    def normal_value(self) -> float:
        return 0.0


class ShareSignal(Signal):
    """Change of a share against its reference share (proportion, quantile)."""

    def families(self):
        return [FAMILIES["items"], FAMILIES["matches"], FAMILIES["ref_share"]]

    def value_expr(self):
        s = _sel(self.pipeline, self.stage, self.check)
        w = self.window
        return (f"sum by (pipeline, stage, check) (rate(stagewatch_check_matches_total{s}[{w}]))\n"
                f"  / sum by (pipeline, stage, check) (rate(stagewatch_check_items_total{s}[{w}]))\n"
                f"  - sum by (pipeline, stage, check) (stagewatch_reference_share{s})")

    def baseline(self) -> float:
        params = self.metric.get("params") or {}
        if self.metric["statistic"] == "quantile":
            return 1 - params.get("q", 0.95)
        return params.get("baseline", 0.01)

    def simulate(self, value, steps, start, step_s):
        p0 = self.baseline()
        per_step = 1000.0
        shares = [p0 if value is None or i < start else p0 + value for i in range(steps)]
        labels = self.check_labels
        out = Series()
        out.add(f"stagewatch_check_items_total{{{labels}}}", counter([per_step] * steps))
        out.add(f"stagewatch_check_matches_total{{{labels}}}", counter([per_step * s for s in shares]))
        out.add(f"stagewatch_reference_share{{{labels}}}", [p0] * steps)
        return out

    def feasible(self, value: float) -> bool:
        return 0.0 <= self.baseline() + value <= 1.0


class CountSignal(Signal):
    """Relative change of a count rate against its reference rate."""

    def families(self):
        return [FAMILIES["items"], FAMILIES["ref_rate"]]

    def value_expr(self):
        s = _sel(self.pipeline, self.stage, self.check)
        return (f"sum by (pipeline, stage, check) (rate(stagewatch_check_items_total{s}[{self.window}]))\n"
                f"  / sum by (pipeline, stage, check) (stagewatch_reference_items_per_second{s}) - 1")

    def simulate(self, value, steps, start, step_s):
        rate = 10.0  # items per second
        labels = self.check_labels
        per = [rate * step_s * (1 if value is None or i < start else 1 + value) for i in range(steps)]
        out = Series()
        out.add(f"stagewatch_check_items_total{{{labels}}}", counter(per))
        out.add(f"stagewatch_reference_items_per_second{{{labels}}}", [rate] * steps)
        return out

    def feasible(self, value):
        return value > -1


class BinSignal(Signal):
    """PSI or category-mix effect size w from per-bin counters and reference shares, in PromQL.

    PSI is the plan's PSI (:func:`stagewatch.binned.psi`): every window count gets ``PSI_SMOOTHING`` (+0.5) before
    the shares are taken, and the reference gauge holds the reference's shares smoothed the same way, so an empty
    bin is a finite share and a bin that empties completely still counts. A bin whose counter series was never
    created reads as an empty bin (``or`` with the reference-share series times 0), as long as the check has any
    bin series at all. The category mix needs no smoothing (no logarithm); only its reference share is floored at
    ``SMOOTH`` so that the division stays finite.
    """

    @property
    def bins(self) -> int:
        params = self.metric.get("params") or {}
        return int(params.get("bins") or params.get("categories") or BINS_DEFAULT)

    def families(self):
        return [FAMILIES["bins"], FAMILIES["ref_share"]]

    def recording(self):
        s = _sel(self.pipeline, self.stage, self.check)
        w = self.window
        by_bin = "pipeline, stage, check, bin"
        by_check = "pipeline, stage, check"
        increase = f"increase(stagewatch_check_bin_items_total{s}[{w}])"
        counts = (f"sum by ({by_bin}) ({increase})\n"
                  f"  or on ({by_bin})\n"
                  f"  (sum by ({by_bin}) (stagewatch_reference_share{s}) * 0\n"
                  f"   and on ({by_check}) sum by ({by_check}) ({increase}))")
        c = f"stagewatch:check_bin_items{s}"
        if self.metric["statistic"] == "psi":
            # (c_i + 0.5) / sum_j (c_j + 0.5), as binned.smoothed_shares.
            share = (f"({c} + {PSI_SMOOTHING:g})\n  / on ({by_check}) group_left\n"
                     f"  sum by ({by_check}) ({c} + {PSI_SMOOTHING:g})")
            ref = f"clamp_min(sum by ({by_bin}) (stagewatch_reference_share{s}), {PSI_REFERENCE_FLOOR:g})"
        else:
            share = f"{c}\n  / on ({by_check}) group_left\n  sum by ({by_check}) ({c})"
            ref = f"clamp_min(sum by ({by_bin}) (stagewatch_reference_share{s}), {SMOOTH})"
        rules = [{"record": "stagewatch:check_bin_items", "expr": counts, "labels": {"check": self.check}},
                 {"record": "stagewatch:check_bin_share", "expr": share, "labels": {"check": self.check}},
                 {"record": "stagewatch:check_bin_reference", "expr": ref, "labels": {"check": self.check}}]
        a = f"stagewatch:check_bin_share{s}"
        e = f"stagewatch:check_bin_reference{s}"
        if self.metric["statistic"] == "psi":
            value = (f"sum by ({by_check}) (\n  ({a} - on ({by_bin}) {e})\n"
                     f"  * on ({by_bin}) ln({a} / on ({by_bin}) {e})\n)")
        else:
            value = (f"sqrt(sum by ({by_check}) (\n  ({a} - on ({by_bin}) {e}) ^ 2\n"
                     f"  / on ({by_bin}) {e}\n))")
        rules.append({"record": "stagewatch:check_value", "expr": value, "labels": {"check": self.check}})
        return rules

    def value_expr(self):  # pragma: no cover - recording() builds the chain
        return self.recording()[-1]["expr"]

    def reference_shares(self) -> list[float]:
        """The reference shares the rule tests publish (and the plan assumes until calibrated): uniform."""
        return [1 / self.bins] * self.bins

    def shares_for(self, value: float, items: float) -> list[float]:
        """Window shares whose statistic on ``items`` window items against the reference equals ``value``."""
        if value <= 0:
            return self.reference_shares()
        return list(_fault_shares(self.metric["statistic"], self.bins, value, items))

    def simulate(self, value, steps, start, step_s):
        b = self.bins
        ref = self.reference_shares()
        per_step = 1000.0
        window_items = per_step * durations.parse(self.window) / step_s
        fault = self.shares_for(value, window_items) if value is not None else ref
        out = Series()
        for i in range(b):
            labels = f'{self.check_labels}, bin="{i}"'
            per = [per_step * (ref[i] if value is None or t < start else fault[i]) for t in range(steps)]
            out.add(f"stagewatch_check_bin_items_total{{{labels}}}", counter(per))
            out.add(f"stagewatch_reference_share{{{labels}}}", [ref[i]] * steps)
        return out

    def feasible(self, value):
        top = statistic_of(self.metric["statistic"], [1e9] + [0.0] * (self.bins - 1), self.reference_shares())
        return 0 <= value < top


@lru_cache(maxsize=None)
def _fault_shares(statistic: str, bins: int, value: float, items: float) -> tuple[float, ...]:
    """Bin shares (the first bin grown, the others shrunk alike) at which ``statistic`` on ``items`` items against
    uniform reference shares equals ``value``, by bisection. It depends only on these four numbers, which many
    checks share, so each is solved once per export."""
    ref = [1 / bins] * bins

    def shares(lam: float) -> list[float]:
        return [(1 - lam) / bins + (lam if i == 0 else 0.0) for i in range(bins)]

    lo, hi = 0.0, 1.0
    for _ in range(100):
        mid = (lo + hi) / 2
        lo, hi = (mid, hi) if statistic_of(statistic, [items * x for x in shares(mid)], ref) < value else (lo, mid)
    return tuple(shares((lo + hi) / 2))


def statistic_of(statistic: str, counts: Sequence[float], reference: Sequence[float]) -> float:
    """The value the PromQL above computes from window ``counts`` and reference shares, with the same smoothing.

    For PSI this is :func:`stagewatch.binned.psi` with ``PSI_SMOOTHING`` when ``reference`` holds the reference's
    smoothed shares.
    """
    if statistic == "psi":
        total = sum(counts) + PSI_SMOOTHING * len(counts)
        a = [(x + PSI_SMOOTHING) / total for x in counts]
        return sum((x - y) * math.log(x / y) for x, y in zip(a, reference))
    total = sum(counts)
    e = [max(x, SMOOTH) for x in reference]
    return math.sqrt(sum((x / total - y) ** 2 / y for x, y in zip(counts, e)))


class GaugeStatisticSignal(Signal):
    """KS distance or mean shift published by the data checks as a gauge."""

    def families(self):
        return [FAMILIES["statistic"]]

    def value_expr(self):
        s = _sel(self.pipeline, self.stage, self.check)
        return f"max by (pipeline, stage, check) (stagewatch_check_statistic{s})"

    def simulate(self, value, steps, start, step_s):
        labels = self.check_labels
        out = Series()
        out.add(f"stagewatch_check_statistic{{{labels}}}",
                [0.0 if value is None or i < start else value for i in range(steps)])
        return out

    def feasible(self, value):
        return self.metric["statistic"] != "ks" or 0 <= value <= 1


def signal_for(metric: dict[str, Any], pipeline: str, stage: str, stage_info: dict[str, Any]) -> Signal | None:
    """The signal for a plan metric; None for burn-rate metrics (handled as SLO alert pairs)."""
    statistic = metric["statistic"]
    args = (metric, pipeline, stage, stage_info)
    if statistic == "burn_rate":
        return None
    if statistic in ("proportion", "quantile"):
        return ShareSignal(*args)
    if statistic == "count":
        return CountSignal(*args)
    if statistic in ("psi", "chi_square"):
        return BinSignal(*args)
    if statistic in ("ks", "mean", "cusum"):  # cusum: S / h published by `stagewatch check`, 1 is the limit
        return GaugeStatisticSignal(*args)
    from stagewatch.exporters.level_signals import level_signal  # the fixed limits build on the classes above

    return level_signal(metric, pipeline, stage, stage_info)
