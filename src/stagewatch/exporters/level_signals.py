"""Signals of fixed limits on levels (counted events, gauges held for a window, ages, durations against a
reference, firing alerts): no sampling noise, so their thresholds read as levels, not sizes of change."""

from __future__ import annotations

from typing import Any, ClassVar

from stagewatch import durations
from stagewatch.exporters.signals import FAMILIES, Series, Signal, _sel, counter


class CounterLevelSignal(Signal):
    """A count of events over the window (failed runs, NaN outputs, dependency changes) against a fixed limit."""

    level_reading: ClassVar[bool] = True

    def families(self):
        return [FAMILIES["matches"]]

    def value_expr(self):
        s = _sel(self.pipeline, self.stage, self.check)
        return f"sum by (pipeline, stage, check) (increase(stagewatch_check_matches_total{s}[{self.window}]))"

    def simulate(self, value, steps, start, step_s):
        labels = self.check_labels
        per = [0.0] * steps
        if value is not None and start < steps:
            per[start] = value  # the events happen at once, just after `start`
        out = Series()
        out.add(f"stagewatch_check_matches_total{{{labels}}}", counter(per))
        return out

    def feasible(self, value):
        return value >= 0


class GaugeLevelSignal(Signal):
    """A gauge against a fixed limit; it must hold for the whole window (``for`` = window)."""

    level_reading: ClassVar[bool] = True
    family_key = "saturation"

    @property
    def for_(self):
        return self.window

    def families(self):
        return [FAMILIES[self.family_key]]

    def value_expr(self):
        family = FAMILIES[self.family_key]
        if "check" in family.labels:
            s = _sel(self.pipeline, self.stage, self.check)
            return f"max by (pipeline, stage, check) ({family.name}{s})"
        s = _sel(self.pipeline, self.stage)
        return f'label_replace(max by (pipeline, stage) ({family.name}{s}), "check", "{self.check}", "", "")'

    def gauge_values(self, value, steps, start, step_s):
        normal = self.normal_value()
        return [normal if value is None or i < start else value for i in range(steps)]

    def simulate(self, value, steps, start, step_s):
        family = FAMILIES[self.family_key]
        labels = f'pipeline="{self.pipeline}", stage="{self.stage}"'
        if "check" in family.labels:
            labels += f', check="{self.check}"'
        out = Series()
        out.add(f"{family.name}{{{labels}}}", self.gauge_values(value, steps, start, step_s))
        return out

    def normal_value(self):
        limits = [x for x in (self.metric.get("warn"), self.metric.get("critical")) if x is not None]
        return 0.5 * min(limits) if self.metric["direction"] == "above" else 2 * max(limits)

    def feasible(self, value):
        return value >= 0


class AgeSignal(GaugeLevelSignal):
    """Age from a timestamp gauge, in a unit of ``unit_seconds`` (model age in days, output age in run intervals)."""

    family_key = "trained"
    unit_seconds: float = 86400.0

    @property
    def for_(self):
        return "0s"

    def value_expr(self):
        s = _sel(self.pipeline, self.stage)
        family = FAMILIES[self.family_key]
        return (f'label_replace((time() - max by (pipeline, stage) ({family.name}{s})) / {self.unit_seconds:g}, '
                f'"check", "{self.check}", "", "")')

    def gauge_values(self, value, steps, start, step_s):
        # A timestamp that keeps the age at the normal value, then stops moving so the age grows past `value`.
        out = []
        normal = self.normal_value() * self.unit_seconds
        frozen = None
        for i in range(steps):
            now = i * step_s
            if value is None or i < start:
                out.append(now - normal)
            else:
                if frozen is None:
                    frozen = start * step_s - value * self.unit_seconds
                out.append(frozen)
        return out


class RatioToReferenceSignal(GaugeLevelSignal):
    """A duration divided by its reference duration (run time, inference time per item)."""

    family_key = "run_duration"

    @property
    def for_(self):
        return "0s"

    def families(self):
        return [FAMILIES[self.family_key], FAMILIES["ref_seconds"]]

    def value_expr(self):
        s = _sel(self.pipeline, self.stage)
        c = _sel(self.pipeline, self.stage, self.check)
        family = FAMILIES[self.family_key]
        if family.type == "histogram":
            current = (f"sum by (pipeline, stage) (rate({family.name}_sum{s}[{self.window}]))\n"
                       f"  / sum by (pipeline, stage) (rate({family.name}_count{s}[{self.window}]))")
        else:
            current = f"max by (pipeline, stage) ({family.name}{s})"
        return (f'label_replace({current}, "check", "{self.check}", "", "")\n'
                f"  / on (pipeline, stage, check) max by (pipeline, stage, check) (stagewatch_reference_seconds{c})")

    def simulate(self, value, steps, start, step_s):
        reference = 2.0
        ratios = self.gauge_values(value, steps, start, step_s)
        family = FAMILIES[self.family_key]
        labels = f'pipeline="{self.pipeline}", stage="{self.stage}"'
        c = self.check_labels
        out = Series()
        if family.type == "histogram":
            out.add(f"{family.name}_count{{{labels}}}", counter([100.0] * steps))
            out.add(f"{family.name}_sum{{{labels}}}", counter([100.0 * reference * r for r in ratios]))
        else:
            out.add(f"{family.name}{{{labels}}}", [reference * r for r in ratios])
        out.add(f"stagewatch_reference_seconds{{{c}}}", [reference] * steps)
        return out


class AlertsSignal(GaugeLevelSignal):
    """Stages whose software alerts are firing, from Prometheus' own ALERTS series."""

    @property
    def for_(self):
        return "0s"

    def families(self):
        return []

    def value_expr(self):
        firing = (f'ALERTS{{alertstate="firing", layer="software", pipeline="{self.pipeline}", '
                  f'stage!="pipeline"}}')
        return (f'label_replace(label_replace(count by (pipeline) (count by (pipeline, stage) ({firing})), '
                f'"stage", "pipeline", "", ""), "check", "{self.check}", "", "")')

    def simulate(self, value, steps, start, step_s):
        out = Series()
        n = int(value) if value is not None else 0
        for k in range(max(n, 1)):
            labels = (f'alertname="SyntheticSoftwareAlert{k}", alertstate="firing", layer="software", '
                      f'pipeline="{self.pipeline}", stage="synthetic_{k}"')
            out.add(f"ALERTS{{{labels}}}", [1.0 if (value is not None and i >= start and k < n) else None
                                           for i in range(steps)])
        return out


# Fixed-limit checks, by the catalog rule that proposed them.
_LEVELS: dict[str, tuple[type, dict[str, Any]]] = {
    "software.batch.run_success": (CounterLevelSignal, {}),
    "mlts.numerical": (CounterLevelSignal, {}),
    "mlts.numerical_confidence": (CounterLevelSignal, {}),
    "mlts.dependencies": (CounterLevelSignal, {}),
    "software.online.saturation": (GaugeLevelSignal, {"family_key": "saturation"}),
    "mlts.staleness": (AgeSignal, {"family_key": "trained", "unit_seconds": 86400.0}),
    "software.batch.freshness": (AgeSignal, {"family_key": "last_success"}),
    "software.batch.duration": (RatioToReferenceSignal, {"family_key": "run_duration"}),
    "mlts.compute": (RatioToReferenceSignal, {"family_key": "inference"}),
    "pipeline.software.health": (AlertsSignal, {}),
}


def level_signal(metric: dict[str, Any], pipeline: str, stage: str, stage_info: dict[str, Any]) -> Signal:
    """The level signal for a metric, chosen by the catalog rule that proposed it."""
    cls, attrs = _LEVELS.get(metric.get("source", ""), (GaugeLevelSignal, {"family_key": "level"}))
    sig = cls(metric, pipeline, stage, stage_info)
    for key, value in attrs.items():
        setattr(sig, key, value)
    if isinstance(sig, AgeSignal) and sig.family_key == "last_success":
        sig.unit_seconds = float(durations.parse(stage_info.get("run_every") or "1h"))
    return sig
