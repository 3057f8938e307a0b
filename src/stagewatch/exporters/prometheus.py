"""Prometheus export: rule files (one group per stage and one for the pipeline), promtool rule unit tests,
an Alertmanager configuration with inhibition along the pipeline graph, and the instrumentation spec.

Everything is built in memory first and written at the end, so a failure writes nothing.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence


from stagewatch import durations, stats, yamlio
from stagewatch.data import contract
from stagewatch.errors import StagewatchError
from stagewatch.escape import go_template_literal
from stagewatch.names import alert_name
from stagewatch.owned import write_owned
from stagewatch.safewrite import STDOUT
from stagewatch.exporters import live_metrics
from stagewatch.exporters.alert_text import alert_annotations, alert_labels, fmt, inert
from stagewatch.exporters.alertmanager import AM_HEADER, Lineage, alertmanager_config, drift_below, explains_drift
from stagewatch.exporters.instrumentation import instrumentation_markdown
from stagewatch.exporters.level_signals import CounterLevelSignal
from stagewatch.exporters.signals import (FAMILIES, Series, ShareSignal, Signal, counter,
                                          signal_for)
from stagewatch.plan import all_metrics

PIPELINE_STAGE = "pipeline"
SLO_WINDOWS = ("5m", "30m", "1h", "6h", "3d")

def _templated(values: dict[str, str]) -> dict[str, str]:
    """Label values and annotations as written in a rule: Prometheus expands them as Go templates."""
    return {key: go_template_literal(value) for key, value in values.items()}


def _compare(value: str, metric: dict[str, Any], threshold: float, level_reading: bool) -> str:
    t = fmt(threshold)
    direction = metric["direction"]
    if level_reading:
        return f"{value} {'<=' if direction == 'below' else '>='} {t}"
    if direction == "above":
        return f"{value} > {t}"
    if direction == "below":
        return f"{value} < -{t}"
    return f"abs({value}) > {t}"


@dataclass
class GroupExport:
    """The rules of one stage (one file): fixed limits and SLOs in one group evaluated at Prometheus' global
    interval, and statistical checks in one group per window length, evaluated once per window (``interval`` =
    the window), so that each check judges tumbling windows as its false-alarm budget assumes."""

    name: str
    stage: str
    file: str
    rules: list[dict[str, Any]] = field(default_factory=list)
    windowed: dict[str, list[dict[str, Any]]] = field(default_factory=dict)
    cases: list["Case"] = field(default_factory=list)
    alerts: int = 0
    lineage: str | None = None  # the stage's lineage label (alertmanager.Lineage)

    def target(self, sig: Signal) -> list[dict[str, Any]]:
        """Where a signal's rules go: its window's group if its threshold was sized against a budget."""
        if sig.metric["statistic"] in stats.STATISTICS:
            return self.windowed.setdefault(sig.window, [])
        return self.rules

    def all_rules(self) -> list[dict[str, Any]]:
        return self.rules + [r for rules in self.windowed.values() for r in rules]

    def rule_groups(self) -> list[dict[str, Any]]:
        groups = [{"name": self.name, "rules": self.rules}] if self.rules else []
        for window in sorted(self.windowed, key=durations.parse):
            groups.append({"name": f"{self.name}-every-{window}", "interval": window,
                           "rules": self.windowed[window]})
        return groups

    def tests(self) -> dict[str, list[dict[str, Any]]]:
        """promtool tests by sample step: all checks that share a step and a variant run in one test.

        Every check has its own series (its ``check`` label, or its own families for SLOs), so they do not
        interfere; one test per variant keeps promtool's cost at (steps x rules) instead of (checks x steps x
        rules).
        """
        merged: dict[tuple[int, str], dict[str, Any]] = {}
        for case in self.cases:
            test = merged.setdefault((case.step, case.variant), {
                "name": f"{self.stage}: {case.variant}", "interval": durations.format(case.step),
                "input_series": [], "alert_rule_test": []})
            test["input_series"].extend(case.series)
            test["alert_rule_test"].extend(case.alert_tests)
        out: dict[str, list[dict[str, Any]]] = {}
        for (step, _), test in sorted(merged.items()):
            test["alert_rule_test"].sort(key=lambda t: (durations.parse(t["eval_time"]), t["alertname"]))
            out.setdefault(durations.format(step), []).append(test)
        return out


@dataclass
class Case:
    step: int
    variant: str
    series: list[dict[str, str]]
    alert_tests: list[dict[str, Any]]


def _series_lines(series: Series) -> list[dict[str, str]]:
    return [{"series": key, "values": _compact(values)} for key, values in series.values.items()]


def _compact(values: Sequence[float | None]) -> str:
    """Sample values in promtool's expanding notation: a run that promtool's ``a+bxn`` rebuilds (it starts at
    ``a`` and adds ``b`` n times, in float64) within the precision the values are written with (1e-9, relative
    above 1) is written as one term, so a steady counter or gauge costs a few characters instead of one number
    per step. Missing samples stay ``_``."""
    def text(v: float | None) -> str:
        return "_" if v is None else fmt(round(v, 9))

    terms: list[str] = []
    i, count = 0, len(values)
    while i < count:
        first = values[i]
        second = values[i + 1] if i + 2 < count else None
        if first is None or second is None:
            terms.append(text(first))
            i += 1
            continue
        head = text(first)
        step_text = fmt(round(abs(second - first), 9))
        increment = float(step_text) if second >= first else -float(step_text)
        end, value = i, float(head)
        while end + 1 < count:
            target = values[end + 1]
            if target is None or abs(value + increment - target) > 1e-9 * max(1.0, abs(target)):
                break
            value += increment
            end += 1
        if end - i < 2:  # two values: as short written out
            terms.append(head)
            i += 1
            continue
        terms.append(f"{head}{'-' if second < first else '+'}{step_text}x{end - i}")
        i = end + 1
    return " ".join(terms)


def _step(window: str) -> int:
    """Sample step of a rule test: a tenth of the window, whole minutes (promtool cost grows with eval steps)."""
    return max(60, int(durations.parse(window) / 10) // 60 * 60)


EXPLAINS_SHOWN = 8  # downstream checks named in an upstream drift alert's annotation


def _signal_alerts(sig: Signal, metric: dict[str, Any], owner: str | None, group: GroupExport,
                   explains: list[str] | None = None) -> None:
    value = f'stagewatch:check_value{{pipeline="{sig.pipeline}", stage="{sig.stage}", check="{sig.check}"}}'
    name = alert_name(metric["id"])
    levels = []
    if metric.get("warn") is not None:
        levels.append(("warn", "ticket", metric["warn"]))
    if metric.get("critical") is not None:
        levels.append(("critical", metric["severity"], metric["critical"]))
    expected: dict[str, dict[str, Any]] = {}
    for level, severity, threshold in levels:
        rule: dict[str, Any] = {"alert": name, "expr": _compare(value, metric, threshold, sig.level_reading)}
        if sig.for_ != "0s":
            rule["for"] = sig.for_
        labels = alert_labels(metric, owner, level, severity, group.lineage)
        annotations = alert_annotations(metric, level, threshold, sig.stage_info)
        if explains and level == "critical":
            shown = ", ".join(explains[:EXPLAINS_SHOWN])
            more = len(explains) - EXPLAINS_SHOWN
            annotations["likely_explains"] = inert(
                "drift checks below this stage that this alert holds back while it fires (they stay visible as "
                f"inhibited): {shown}" + (f" and {more} more" if more > 0 else ""))
        rule["labels"] = _templated(labels)
        rule["annotations"] = _templated(annotations)
        group.target(sig).append(rule)
        group.alerts += 1
        base = {"pipeline": sig.pipeline, "stage": sig.stage, "check": sig.check}
        expected[level] = {"exp_labels": {**base, **labels}, "exp_annotations": annotations}
    group.cases.extend(_signal_tests(sig, metric, name, levels, expected))


def _fault_value(sig: Signal, metric: dict[str, Any], magnitude: float) -> float | None:
    """A statistic value of size ``magnitude`` in the direction the alert watches, if the signal can produce it."""
    direction = metric["direction"]
    if sig.level_reading:
        candidates = [magnitude]
    elif direction == "above":
        candidates = [magnitude]
    elif direction == "below":
        candidates = [-magnitude]
    else:
        candidates = [magnitude, -magnitude]
    for value in candidates:
        if sig.feasible(value):  # type: ignore[attr-defined]
            return value
    return None


def _signal_tests(sig: Signal, metric: dict[str, Any], name: str, levels: list[tuple[str, str, float]],
                  expected: dict[str, dict[str, Any]]) -> list[Case]:
    if not levels:
        return []
    step = _step(metric["window"])
    window_steps = math.ceil(durations.parse(metric["window"]) / step)
    for_steps = math.ceil(durations.parse(sig.for_) / step) if sig.for_ != "0s" else 0
    start = window_steps + 2
    if isinstance(sig, CounterLevelSignal):
        eval_index = start + max(1, window_steps // 2)  # the events must still lie inside the window
    else:
        eval_index = start + window_steps + for_steps + 1
    steps = eval_index + 2
    eval_time = durations.format(eval_index * step)
    critical = metric.get("critical")
    warn = metric.get("warn")
    tests = []
    top = max(t for _, _, t in levels)
    if isinstance(sig, CounterLevelSignal):
        magnitude = top
    elif sig.level_reading and metric["direction"] == "below":
        magnitude = min(t for _, _, t in levels) * 0.5
    else:
        magnitude = top * 1.5
    cases = [("fault", _fault_value(sig, metric, magnitude), [lvl for lvl, _, _ in levels])]
    if warn is not None and critical is not None and not isinstance(sig, CounterLevelSignal):
        between = (warn + critical) / 2
        cases.append(("warn only", _fault_value(sig, metric, between), ["warn"]))
    quiet_time = durations.format((start - 1) * step)
    for label, value, firing in cases:
        if value is None:
            raise StagewatchError(f"metric '{metric['id']}': no value of its statistic reaches the threshold "
                                  f"{magnitude / 1.5:g}, so its alert could never fire",
                                  expected="a threshold the statistic can reach (a larger volume gives a lower "
                                  "noise floor), or status: rejected with a note")
        # One series per check: a full window of normal data (the alert must stay quiet), then the fault.
        variant = "quiet while normal, then a fault past every threshold" if label == "fault" else (
            "quiet while normal, then a fault between warn and critical")
        tests.append(Case(step, variant, _series_lines(sig.simulate(value, steps, start, step)), [
            {"eval_time": quiet_time, "alertname": name, "exp_alerts": []},
            {"eval_time": eval_time, "alertname": name, "exp_alerts": [expected[lvl] for lvl in firing]}]))
    return tests


def _slo_alerts(metric: dict[str, Any], pipeline: str, stage: str, stage_info: dict[str, Any],
                owner: str | None, group: GroupExport) -> None:
    sizing = metric.get("sizing") or {}
    target = sizing.get("slo_target") or stage_info.get("slo_target") or 0.999
    budget = 1 - target
    s = f'{{pipeline="{pipeline}", stage="{stage}"}}'
    latency = "latency" in metric["id"]
    slo_s = (stage_info.get("latency_slo_ms") or 0) / 1000
    le = f"{slo_s:g}"
    pairs = sizing.get("burn_rate_alerts") or []
    windows = sorted({p["long_window"] for p in pairs} | {p["short_window"] for p in pairs} | set(SLO_WINDOWS),
                     key=durations.parse)
    record = "stagewatch:slo_latency_miss_ratio" if latency else "stagewatch:slo_error_ratio"
    for w in windows:
        if latency:
            expr = (f'1 - sum by (pipeline, stage) (rate(stagewatch_request_duration_seconds_bucket'
                    f'{{pipeline="{pipeline}", stage="{stage}", le="{le}"}}[{w}]))\n'
                    f"  / sum by (pipeline, stage) (rate(stagewatch_request_duration_seconds_count{s}[{w}]))")
        else:
            expr = (f"sum by (pipeline, stage) (rate(stagewatch_request_errors_total{s}[{w}]))\n"
                    f"  / sum by (pipeline, stage) (rate(stagewatch_requests_total{s}[{w}]))")
        group.rules.append({"record": f"{record}:rate{w}", "expr": expr, "labels": {"check": metric["id"]}})
    sel = f'{{pipeline="{pipeline}", stage="{stage}", check="{metric["id"]}"}}'
    name = alert_name(metric["id"])
    expected = {}
    for severity, level in (("page", "critical"), ("ticket", "warn")):
        mine = [p for p in pairs if p["severity"] == severity]
        if not mine:
            continue
        clauses = [f"({record}:rate{p['long_window']}{sel} > {fmt(p['burn_rate'] * budget)}\n"
                   f"   and {record}:rate{p['short_window']}{sel} > {fmt(p['burn_rate'] * budget)})" for p in mine]
        threshold = min(p["burn_rate"] for p in mine)
        annotations = alert_annotations(metric, level, threshold, stage_info)
        annotations["summary"] = inert(
            f"{metric['id']}: error budget of the {target:g} SLO burning at more than {fmt(threshold)}x "
            f"({', '.join(p['long_window'] + '/' + p['short_window'] for p in mine)})")
        labels = alert_labels(metric, owner, level, severity)
        rule: dict[str, Any] = {"alert": name, "expr": "\n  or ".join(clauses),
                                "labels": _templated(labels), "annotations": _templated(annotations)}
        group.rules.append(rule)
        group.alerts += 1
        expected[level] = {"exp_labels": {"pipeline": pipeline, "stage": stage, "check": metric["id"],
                                          **labels}, "exp_annotations": annotations}
    fast = max((p["burn_rate"] for p in pairs if p["severity"] == "page"), default=14.4)
    slow = min((p["burn_rate"] for p in pairs if p["severity"] == "ticket"), default=1.0)
    page_min = min((p["burn_rate"] for p in pairs if p["severity"] == "page"), default=6.0)
    cases = [("fast burn", min(0.999, fast * budget * 5), list(expected)),
             ("slow burn", min(0.9, (slow + page_min) / 2 * budget), [lvl for lvl in expected if lvl == "warn"]),
             ("within budget", budget * 0.1, [])]
    for label, ratio, firing in cases:
        steps = 22
        start = 10 if label == "fast burn" else 0
        eval_index = 20
        ratios = [0.0 if i < start else ratio for i in range(steps)]
        series = Series()
        if latency:
            series.add(f'stagewatch_request_duration_seconds_count{{pipeline="{pipeline}", stage="{stage}"}}',
                       counter([1000.0] * steps))
            series.add(f'stagewatch_request_duration_seconds_bucket{{pipeline="{pipeline}", stage="{stage}", '
                       f'le="{le}"}}', counter([1000.0 * (1 - r) for r in ratios]))
        else:
            series.add(f'stagewatch_requests_total{{pipeline="{pipeline}", stage="{stage}"}}',
                       counter([1000.0] * steps))
            series.add(f'stagewatch_request_errors_total{{pipeline="{pipeline}", stage="{stage}"}}',
                       counter([1000.0 * r for r in ratios]))
        variant = {"fast burn": "SLO: fast burn pages and tickets",
                   "slow burn": "SLO: slow burn opens a ticket only",
                   "within budget": "SLO: burning within budget stays quiet"}[label]
        group.cases.append(Case(60, variant, _series_lines(series), [
            {"eval_time": durations.format(eval_index * 60), "alertname": name,
             "exp_alerts": [expected[lvl] for lvl in firing]}]))


@dataclass
class PrometheusExport:
    groups: list[GroupExport]
    alertmanager: dict[str, Any]
    instrumentation: dict[str, Any]


def cusum_view(metric: dict[str, Any]) -> dict[str, Any]:
    """The alert of a share's sequential option: `stagewatch check` publishes the CUSUM as S / h in
    ``stagewatch_check_statistic{check="<id>#cusum"}``, so the limit is 1 whatever the data made h."""
    view = {k: v for k, v in metric.items() if k not in ("sequential", "sizing", "params", "fingerprint", "review")}
    view.update({"id": f"{metric['id']}#cusum", "statistic": "cusum", "warn": None, "critical": 1.0,
                 "direction": "above", "unit": "share of the CUSUM limit",
                 "measure": f"CUSUM of: {metric.get('measure', metric['id'])} (S / h, published by stagewatch check)"})
    return view


def _with_sequential(metrics: list[dict[str, Any]]) -> list[dict[str, Any]]:
    out = []
    for metric in metrics:
        out.append(metric)
        if metric.get("sequential") and metric["statistic"] in ("proportion", "quantile"):
            out.append(cusum_view(metric))
    return out


def build(plan: dict[str, Any]) -> PrometheusExport:
    pipeline = plan["pipeline"]
    live = {m["id"] for m in live_metrics(plan)}
    groups = []
    owners: set[str] = set()
    blocks = [(s["id"], s, s.get("metrics", [])) for s in plan["stages"]]
    blocks.append((PIPELINE_STAGE, {"id": PIPELINE_STAGE}, plan.get("pipeline_metrics", [])))
    families: dict[str, dict[str, Any]] = {}
    below_drift = drift_below(plan, live)
    lineage = Lineage.of(plan)
    for stage_id, info, metrics in blocks:
        owner = info.get("owner") or plan.get("owner")
        if owner:
            owners.add(owner)
        group = GroupExport(name=f"stagewatch-{pipeline}-{stage_id}", stage=stage_id,
                            file=f"{stage_id}.rules.yml",
                            lineage=lineage.label(stage_id) if stage_id in lineage.position else None)
        for metric in _with_sequential(metrics):
            if metric["id"].split("#")[0] not in live:
                continue
            sig = None
            if metric["statistic"] == "burn_rate":
                _slo_alerts(metric, pipeline, stage_id, info, owner, group)
                fams = [FAMILIES["latency"] if "latency" in metric["id"] else FAMILIES["requests"]]
                if "latency" not in metric["id"]:
                    fams.append(FAMILIES["errors"])
            else:
                sig = signal_for(metric, pipeline, stage_id, info)
                assert sig is not None
                group.target(sig).extend(sig.recording())
                _signal_alerts(sig, metric, owner, group,
                               below_drift.get(stage_id) if explains_drift(metric) else None)
                fams = sig.families()
            for fam in fams:
                entry = families.setdefault(fam.name, {"name": fam.name, "type": fam.type, "labels": list(fam.labels),
                                                       "help": fam.help, "uses": []})
                use = {"stage": stage_id, "check": metric["id"], "statistic": metric["statistic"]}
                if fam.name == "stagewatch_check_bin_items_total":
                    params = metric.get("params") or {}
                    use["bins"] = params.get("bins") or params.get("categories") or 10
                if fam.name == "stagewatch_request_duration_seconds":
                    use["bucket_le"] = f"{(info.get('latency_slo_ms') or 0) / 1000:g}"
                if metric.get("field"):
                    use["field"] = metric["field"]
                if metric.get("on_labels") and fam.name in ("stagewatch_check_items_total",
                                                            "stagewatch_check_matches_total"):
                    use["at_label_arrival"] = True
                if isinstance(sig, ShareSignal) and fam.name == "stagewatch_reference_share":
                    use["reference_share"] = sig.baseline()
                entry["uses"].append(use)
        groups.append(group)
    instrumentation = {"pipeline": pipeline, "families": sorted(families.values(), key=lambda f: f["name"]),
                       "stages": [s["id"] for s in plan["stages"]] + [PIPELINE_STAGE],
                       "checks": {m["id"]: {"statistic": m["statistic"], "window": m["window"],
                                            "warn": m.get("warn"), "critical": m.get("critical"),
                                            "direction": m["direction"], "measure": m.get("measure", "")}
                                  for m in all_metrics(plan) if m["id"] in live}}
    return PrometheusExport(groups, alertmanager_config(plan, sorted(owners), lineage), instrumentation)


RULES_HEADER = "# Generated by `stagewatch export --to prometheus` from the plan; edit the plan, then re-export.\n"
def export_prometheus(plan: dict[str, Any], target: str, inputs: Sequence[str] = (), force: bool = False) -> list[str]:
    if target == STDOUT:
        raise StagewatchError("the Prometheus export is a directory of files and cannot go to standard output",
                              expected="-o DIR")
    built = build(plan)
    out = Path(target)
    files: dict[Path, str] = {}
    for group in built.groups:
        if not group.all_rules():
            continue
        files[out / "rules" / group.file] = RULES_HEADER + yamlio.dump({"groups": group.rule_groups()})
        # One test file per sample step: promtool evaluates every rule of the file at each evaluation_interval up
        # to the last eval_time, so a day-long window is tested at a coarse step and a 5m window at 1m.
        by_step = group.tests()
        for interval in sorted(by_step, key=durations.parse):
            name = group.file.replace(".rules.yml", f".{interval}.test.yml")
            test_file = out / "tests" / name
            files[test_file] = RULES_HEADER + yamlio.dump({
                "rule_files": [f"../rules/{group.file}"], "evaluation_interval": interval,
                "tests": by_step[interval]})
    files[out / "alertmanager.yml"] = AM_HEADER + yamlio.dump(built.alertmanager)
    files[out / "instrumentation.json"] = json.dumps(built.instrumentation, indent=2) + "\n"
    files[out / "instrumentation.md"] = (instrumentation_markdown(built.instrumentation)
                                         + contract.log_columns_markdown(plan))
    example = Path(__file__).with_name("example_exporter.py")
    files[out / "example_exporter.py"] = example.read_text(encoding="utf-8")
    outcome = write_owned(out, files, kind="export", inputs=inputs, force=force)
    alerts = sum(g.alerts for g in built.groups)
    checked = sum(len(t["alert_rule_test"]) for g in built.groups for ts in g.tests().values() for t in ts)
    return [f"wrote {out / 'rules'}/: {sum(len(g.rule_groups()) for g in built.groups)} rule groups, "
            f"{alerts} alerting rules",
            f"wrote {out / 'tests'}/: promtool unit tests, {checked} alert evaluations (run: promtool test rules "
            f"{out / 'tests'}/*.yml)",
            f"wrote {out / 'alertmanager.yml'}: routing by owner and severity, "
            f"{len(built.alertmanager['inhibit_rules'])} inhibition rules",
            f"wrote {out / 'instrumentation.md'} and instrumentation.json: the series each stage must emit",
            *outcome.lines(str(out))]
