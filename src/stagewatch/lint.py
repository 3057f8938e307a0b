"""Check a plan for form and meaning: every stage and hand-off watched, thresholds in order, ids unique."""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, Iterator

from stagewatch import durations, fold, yamlio
from stagewatch import plan as plan_mod
from stagewatch.errors import StagewatchError
from stagewatch.plan import all_metrics, budget_summary, pipeline_of, require_plan

LAYERS = ("software", "input", "output")
LIVE = ("proposed", "accepted")
# The seven production-monitoring checks of the ML Test Score (Breck et al., IEEE Big Data 2017), in the words of
# catalog/ml_test_score.yaml; a metric serves one through its `ml_test_score` numbers.
ML_TEST_SCORE_MONITORING = {1: "dependency changes notify", 2: "data invariants hold for inputs",
                            3: "training and serving are not skewed", 4: "models are not too stale",
                            5: "models are numerically stable", 6: "computing performance has not regressed",
                            7: "prediction quality has not regressed"}


@dataclass(frozen=True)
class Finding:
    file: str
    line: int | None
    code: str
    message: str
    subject: str | None = None

    def __str__(self) -> str:
        where = f"{self.file}:{self.line}" if self.line else self.file
        return f"{where}: [{self.code}] {self.message}"

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def lint_file(path: str) -> list[Finding]:
    """All findings for the plan at ``path``; raises StagewatchError only when the file cannot be read as YAML."""
    doc = yamlio.load(path)
    require_plan(doc, path, "lint checks")
    return lint_document(doc)


def lint_document(doc: yamlio.Document) -> list[Finding]:
    schema_errors = sorted(yamlio.schema_errors(doc.data, "plan"), key=lambda e: list(map(str, e.absolute_path)))
    if schema_errors:
        return [Finding(doc.path, doc.line_of(e.absolute_path), "schema", _schema_message(e)) for e in schema_errors]
    for check, code in ((pipeline_of, "description"), (plan_mod.check_values, "invalid")):
        try:
            check(doc.data, doc)
        except StagewatchError as exc:  # what render and export refuse to read: invalid input, not a finding
            return [Finding(doc.path, exc.line, code, exc.described())]
    return list(_meaning(doc))


INVALID = ("schema", "description", "invalid")  # finding codes that make the plan invalid input (exit 2)


def _schema_message(error: Any) -> str:
    message, expected = yamlio.describe_error(error)
    return message + (f" (expected: {expected})" if expected else "")


def _located(doc: yamlio.Document) -> Iterator[tuple[tuple[Any, ...], dict[str, Any], str | None]]:
    """(path in the document, metric, owner) for every metric."""
    for i, stage in enumerate(doc.data["stages"]):
        for j, metric in enumerate(stage.get("metrics", [])):
            yield ("stages", i, "metrics", j), metric, stage["id"]
    for j, metric in enumerate(doc.data.get("pipeline_metrics", [])):
        yield ("pipeline_metrics", j), metric, "pipeline"


def ordered(warn: float, critical: float, direction: str, statistic: str) -> bool:
    """Warn must be reached before critical. Drift statistics are sizes of change (larger is worse in every
    direction); only fixed-limit levels read as levels, where 'below' means lower is worse."""
    if statistic != "level" or direction == "above":
        return warn < critical
    if direction == "below":
        return warn > critical
    return abs(warn) < abs(critical)


def _meaning(doc: yamlio.Document) -> Iterator[Finding]:
    plan = doc.data
    path = doc.path
    retired = plan.get("retired_metrics") or []
    if retired:  # kept so that no edit is lost, checked no further: nothing exports or measures them
        yield Finding(path, doc.line_of(("retired_metrics",)), "retired",
                      f"{len(retired)} retired metric(s) of stages no longer in the description can be deleted "
                      "(or give the stage that replaced them `renamed_from` and re-run propose to move them)")
    seen: dict[str, int | None] = {}
    for where, metric, owner in _located(doc):
        line = doc.line_of(where)
        mid = metric["id"]
        if mid in seen:
            yield Finding(path, line, "duplicate-id", f"metric id '{mid}' is used again (first on line {seen[mid]})", mid)
        seen.setdefault(mid, line)
        prefix, layer, _ = mid.split(".", 2)
        if owner is not None and prefix != owner:
            yield Finding(path, line, "id-form", f"metric '{mid}' sits under '{owner}' but its id starts with "
                          f"'{prefix}.'; ids are <stage>.<layer>.<name>", mid)
        if layer != metric["layer"]:
            yield Finding(path, doc.line_of((*where, "layer")), "id-form",
                          f"metric '{mid}' has layer '{metric['layer']}' but its id says '{layer}'", mid)
        if metric["window"] == "auto":
            yield Finding(path, doc.line_of((*where, "window")), "window",
                          f"metric '{mid}' still has window 'auto'; run `stagewatch propose` to size it", mid)
        elif durations.is_duration(metric.get("reference")) and (
                durations.parse(metric["reference"]) < durations.parse(metric["window"])):
            yield Finding(path, doc.line_of((*where, "reference")), "window",
                          f"metric '{mid}': reference {metric['reference']} is shorter than window "
                          f"{metric['window']}", mid)
        warn, critical = metric.get("warn"), metric.get("critical")
        yield from _threshold_order(doc, where, metric)
        if warn is None and critical is None and metric["status"] in LIVE:
            yield Finding(path, line, "threshold-missing", f"metric '{mid}' has neither a warn nor a critical "
                          "threshold, so it can never alert", mid)
        if metric["status"] == "rejected" and not (metric.get("note") or "").strip():
            yield Finding(path, doc.line_of((*where, "status")), "rejected-without-note",
                          f"metric '{mid}' is rejected without a note saying why", mid)
        if metric["status"] == "stale":
            yield Finding(path, doc.line_of((*where, "status")), "stale",
                          f"metric '{mid}' is stale: {metric.get('review', 'its rule no longer applies')}", mid)
        floor = (metric.get("sizing") or {}).get("noise_floor")
        if metric["status"] in LIVE and floor is not None and critical is not None and metric["statistic"] != "level":
            if abs(critical) < floor:
                yield Finding(path, doc.line_of((*where, "critical")), "below-noise-floor",
                              f"metric '{mid}': critical {critical:g} is below the noise floor {floor:g} at window "
                              f"{metric['window']}; it will fire on noise", mid)
        for k, pair in enumerate((metric.get("sizing") or {}).get("burn_rate_alerts") or []):
            if metric["status"] in LIVE and pair.get("severity") == "page" and pair.get("burn_rate", 2) <= 1:
                yield Finding(path, doc.line_of((*where, "sizing", "burn_rate_alerts", k, "burn_rate")),
                              "burn-rate", f"metric '{mid}' pages at burn rate {pair['burn_rate']:g} over "
                              f"{pair.get('long_window')}: at a burn rate of 1 or less the error budget lasts the "
                              f"whole SLO period, so this pages while the SLO is met", mid)
    yield from _coverage(doc)
    yield from _duplicate_signals(doc)
    summary = budget_summary(plan)
    if summary["expected_false_pages_per_week"] > plan.get("false_alarms_per_week", 1) * (1 + 1e-9):
        yield Finding(path, doc.line_of(("false_alarms_per_week",)), "budget",
                      f"expected false pages per week {summary['expected_false_pages_per_week']:g} exceed the "
                      f"budget of {plan['false_alarms_per_week']:g}")


def _counts(metric: dict[str, Any]) -> bool:
    """A metric covers what it watches if it is live, or rejected with a note saying why."""
    return metric["status"] in LIVE or (metric["status"] == "rejected" and bool((metric.get("note") or "").strip()))


def _threshold_order(doc: yamlio.Document, where: tuple[Any, ...], metric: dict[str, Any]) -> Iterator[Finding]:
    warn, critical = metric.get("warn"), metric.get("critical")
    if warn is not None and critical is not None and not ordered(warn, critical, metric["direction"],
                                                                  metric["statistic"]):
        yield Finding(doc.path, doc.line_of((*where, "warn")), "threshold-order",
                      f"metric '{metric['id']}': warn {warn:g} must come before critical {critical:g} for "
                      f"direction '{metric['direction']}'", metric["id"])


def misordered(doc: yamlio.Document) -> list[Finding]:
    """Only the thresholds out of order: what would make exported rules alert at the wrong level."""
    return [f for where, metric, _ in _located(doc) for f in _threshold_order(doc, where, metric)]


def _duplicate_signals(doc: yamlio.Document) -> Iterator[Finding]:
    plan = doc.data
    where = {metric["id"]: path for path, metric, _ in _located(doc)}
    for first, later in fold.duplicates(all_metrics(plan)):
        same = ("the same statistic" if first["statistic"] == later["statistic"] else
                f"two distribution statistics ({first['statistic'].upper()} and {later['statistic'].upper()})")
        yield Finding(doc.path, doc.line_of((*where[later["id"]], "id")), "duplicate-signal",
                      f"metrics '{first['id']}' and '{later['id']}' read the same column of the same log with "
                      f"{same}: one excursion would alert twice; keep one (reject the other with a note)",
                      later["id"])


def _coverage(doc: yamlio.Document) -> Iterator[Finding]:
    plan = doc.data
    path = doc.path
    stages = plan["stages"]
    for i, stage in enumerate(stages):
        metrics = [m for m in stage.get("metrics", []) if _counts(m)]
        line = doc.line_of(("stages", i, "id"))
        for layer in LAYERS:
            if layer == "software" and stage.get("kind") == "source":
                continue  # a sensor or an outside feed runs none of the team's software: its output count shows it
            if not any(m["layer"] == layer for m in metrics):
                yield Finding(path, line, "coverage-layer", f"stage '{stage['id']}' has no {layer} metric (add "
                              f"one, or keep a rejected one with a note saying why)", stage["id"])
        if stage.get("kind") == "learned":
            covered = {n for m in metrics for n in m.get("ml_test_score", [])}
            missing = [f"{n} ({what})" for n, what in ML_TEST_SCORE_MONITORING.items() if n not in covered]
            if missing:
                yield Finding(path, line, "ml-test-score", f"learned stage '{stage['id']}' lacks ML Test Score "
                              f"monitoring check{'s' if len(missing) > 1 else ''} {', '.join(missing)}",
                              stage["id"])
    by_id = {s["id"]: s for s in stages}
    for i, stage in enumerate(stages):
        for up in stage.get("upstream", []):
            for side, owner in (("upstream", up), ("downstream", stage["id"])):
                ok = any(_counts(m) for m in fold.on_handoff(by_id[owner].get("metrics", []), up, stage["id"],
                                                                side))
                if not ok:
                    yield Finding(path, doc.line_of(("stages", i, "upstream")), "coverage-edge",
                                  f"hand-off {up} -> {stage['id']} has no check on its {side} side "
                                  f"(stage '{owner}')", f"{up}->{stage['id']}")
