"""``stagewatch check``: every input and output check of a plan on the window ending at ``--at``.

Verdicts: ``ok``, ``warn``, ``critical``, ``insufficient`` (fewer samples than the statistic needs; never an all
clear), ``not_measured`` (a column the check reads is absent, or the baseline has no reference for it).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import reduce
from typing import Any, Callable

from stagewatch import durations, stats
from stagewatch.data import contract, scan, sequential, sources
from stagewatch.data.baseline import hour_of_week, load_baseline
from stagewatch.data.measures import Measure
from stagewatch.errors import StagewatchError

VERDICTS = ("ok", "warn", "critical", "insufficient", "not_measured")
UNSEEN_LIMIT = 10


@dataclass
class CheckRow:
    id: str
    stage: str
    layer: str
    statistic: str
    window: str
    verdict: str
    value: float | None = None
    warn: float | None = None
    critical: float | None = None
    direction: str = "above"
    n: int | None = None
    m: int | None = None
    words: str = ""
    severity: str = "ticket"
    columns: list[str] = field(default_factory=list)
    edge: dict[str, str] | None = None
    detail: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        out = {k: getattr(self, k) for k in ("id", "stage", "layer", "statistic", "window", "verdict", "value",
                                            "warn", "critical", "direction", "n", "m", "severity", "words",
                                            "columns")}
        if self.edge:
            out["edge"] = self.edge
        if self.detail:
            out["detail"] = self.detail
        return out


@dataclass
class CheckResult:
    at: float | None
    rows: list[CheckRow]
    service_checks: int
    stages_without_data: list[str]
    attribution: list[dict[str, Any]] = field(default_factory=list)
    pipeline: str = ""
    plan: dict[str, Any] = field(default_factory=dict, repr=False)  # the plan checked (the HTML report draws it)

    def counts(self) -> dict[str, int]:
        return {v: sum(1 for r in self.rows if r.verdict == v) for v in VERDICTS}


def verdict(value: float | None, direction: str, warn: float | None, critical: float | None) -> str:
    """``ok``, ``warn`` or ``critical`` for a value; thresholds are sizes of change in the metric's direction."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "insufficient"
    score = value if direction == "above" else -value if direction == "below" else abs(value)
    if critical is not None and score >= critical:
        return "critical"
    if warn is not None and score >= warn:
        return "warn"
    return "ok"


def level_verdict(value: float, warn: float | None, critical: float | None) -> str:
    """A fixed limit on a level: fires when the level reaches the limit (a limit of 0 fires on any)."""
    if critical is not None and value >= max(critical, 1e-12):
        return "critical"
    if warn is not None and value >= max(warn, 1e-12):
        return "warn"
    return "ok"


def min_samples(metric: dict[str, Any]) -> int:
    if metric["statistic"] == "level":
        return 1
    return int(stats.make(metric["statistic"], **(metric.get("params") or {})).min_samples())


def expected_rows(stage_ref: dict[str, Any], start: float, end: float) -> float | None:
    """Rows the reference rate expects in ``(start, end]``: by hour of week when known, else the flat rate."""
    by_how = stage_ref.get("rate_by_hour_of_week")
    flat = stage_ref.get("rate_per_hour")
    if not by_how:
        return None if flat is None else flat * (end - start) / 3600.0
    total = 0.0
    t = start
    while t < end:
        hour = math.floor(t / 3600.0)
        upto = min(end, (hour + 1) * 3600.0)
        rate = by_how[hour_of_week(hour)]
        total += (rate if rate is not None else (flat or 0.0)) * (upto - t) / 3600.0
        t = upto
    return total


def _window_seconds(metric: dict[str, Any], override: str | None) -> int | None:
    if override == "all":
        return None
    text = override or metric.get("window")
    try:
        return durations.parse(str(text))
    except ValueError:
        raise StagewatchError(f"window {text!r} of {metric['id']} is not a duration",
                              expected="a duration such as 15m, 6h or 1d, or --window all") from None


def _row(metric: dict[str, Any], stage: str, window: str, verdict_: str, **kw: Any) -> CheckRow:
    return CheckRow(id=metric["id"], stage=stage, layer=metric["layer"], statistic=metric["statistic"],
                    window=window, verdict=verdict_, warn=metric.get("warn"), critical=metric.get("critical"),
                    direction=metric.get("direction", "above"), severity=metric.get("severity", "ticket"),
                    columns=contract.columns_of(metric["reads"]), edge=metric.get("edge"), **kw)


@dataclass
class Runnable:
    metric: dict[str, Any]
    measure: Measure
    ref: dict[str, Any]
    seconds: int | None  # the window; None: the whole input

    @property
    def window(self) -> str:
        return "all" if self.seconds is None else durations.format(self.seconds)

    def aggregates(self) -> list[Any]:
        return [a.renamed(f"{self.metric['id']}#{a.key}") for a in self.measure.aggregates(self.ref)]


def prepare(source: sources.Source, metrics: list[dict[str, Any]], stage_ref: dict[str, Any],
            window_override: str | None) -> tuple[list[CheckRow], list[Runnable]]:
    """Split a stage's checks into those that cannot be measured (as rows saying why) and those that can."""
    numeric_columns = {c for c in source.columns if source.is_numeric(c)}
    rows: list[CheckRow] = []
    runnable: list[Runnable] = []
    for metric in metrics:
        seconds = _window_seconds(metric, window_override)
        window = "all" if seconds is None else durations.format(seconds)
        measure = Measure(metric, numeric_columns)
        absent = [c for c in measure.columns() if not source.has(c)]
        ref = stage_ref.get("checks", {}).get(metric["id"])
        if absent:
            rows.append(_row(metric, source.stage, window, "not_measured",
                             words=f"the log has no column {', '.join(absent)}"))
        elif ref is None:
            rows.append(_row(metric, source.stage, window, "not_measured",
                             words=stage_ref.get("not_calibrated", {}).get(metric["id"])
                             or "the baseline has no reference for this check; re-run calibrate"))
        elif ref.get("signature") != contract.signature(metric):
            rows.append(_row(metric, source.stage, window, "not_measured",
                             words="the check changed since the baseline was made; re-run calibrate"))
        else:
            runnable.append(Runnable(metric, measure, ref, seconds))
    return rows, runnable


def _check_stage(engine: Any, source: sources.Source, metrics: list[dict[str, Any]], stage_ref: dict[str, Any],
                 at: float, window_override: str | None, span: tuple[float | None, float | None]) -> list[CheckRow]:
    rows, runnable = prepare(source, metrics, stage_ref, window_override)
    if not runnable:
        return rows
    aggregates = [a for r in runnable for a in r.aggregates()]
    timed = [r.seconds for r in runnable if r.seconds is not None]
    if len(timed) == len(runnable):
        step = float(reduce(math.gcd, timed))
        buckets = scan.run(engine, source, aggregates, start=at - max(timed), end=at, step=step)
    else:
        step = 0.0
        buckets = scan.run(engine, source, aggregates)
    first_ts, last_ts = span
    for r in runnable:
        metric, measure, ref, seconds = r.metric, r.measure, r.ref, r.seconds
        keys = [a.key for a in measure.aggregates(ref)]
        prefixed = [f"{metric['id']}#{k}" for k in keys]
        if seconds is None:
            summed = scan.total(buckets, -1, -1, prefixed)
            start, end = (first_ts or at) - 1e-9, last_ts or at
        else:
            summed = scan.total(buckets, 0, int(round(seconds / step)) - 1, prefixed)
            start, end = at - seconds, at
        counts = {k.split("#", 1)[1]: v for k, v in summed.items()}
        expected = expected_rows(stage_ref, start, end) if metric["statistic"] == "count" else None
        result = measure.evaluate(ref, counts, expected)
        if metric["statistic"] == "level":
            v = level_verdict(result.value or 0.0, metric.get("warn"), metric.get("critical"))
        elif result.value is None or (result.n or 0) < min_samples(metric):
            v = "insufficient"
        else:
            v = verdict(result.value, metric.get("direction", "above"), metric.get("warn"), metric.get("critical"))
        words = result.words
        if v == "insufficient" and result.value is not None:
            words = f"{result.n:,} samples, {min_samples(metric):,} needed; " + words
        row = _row(metric, source.stage, r.window, v, value=result.value, n=result.n, m=result.m, words=words,
                   detail=result.detail)
        if measure.condition == "unseen" and (result.detail.get("matches") or engine.emits):
            row.detail["unseen_values"] = scan.values_not_in(engine, source, measure.column or "",
                                                             ref.get("categories_seen", []), start, end, UNSEEN_LIMIT)
        rows.append(row)
        cusum = sequential.setup(metric, ref, stage_ref)
        if cusum is not None:
            rows.append(_cusum_row(engine, source, r, cusum, first_ts, at))
    order = {m["id"]: i for i, m in enumerate(metrics)}
    return sorted(rows, key=lambda r: (order[r.id.split("#")[0]], r.id))


def _cusum_row(engine: Any, source: sources.Source, r: Runnable, cusum: Any, first_ts: float | None,
               at: float) -> CheckRow:
    """The CUSUM of a share from the start of the log to ``at``, grouped by hour."""
    import numpy as np

    from stagewatch.cusum import binomial_cusum

    keys = r.aggregates()
    start = (first_ts if first_ts is not None else at) - 1.0
    # every row up to ``at`` (which is every row after ``start``): the query does not depend on the time range,
    # so emitted SQL can ask it before anyone knows the range
    buckets = scan.run(engine, source, keys, start=None, end=at, step=3600.0)
    count = int(math.ceil((at - start) / 3600.0))
    order = sorted((b for b in buckets if 0 <= b < count), reverse=True)
    matches = np.array([buckets[b][f"{r.metric['id']}#matches"] for b in order])
    n = np.array([buckets[b][f"{r.metric['id']}#n"] for b in order])
    path, _ = binomial_cusum(matches, n, cusum.p0, cusum.p1)
    value = float(path[-1]) if path.size else 0.0
    v = "insufficient" if not n.sum() else ("critical" if value >= cusum.h else "ok")
    row = _row(r.metric, source.stage, "sequential", v, value=value, n=int(n.sum()), m=r.ref.get("n"),
               words=cusum.words())
    row.id = f"{r.metric['id']}#cusum"
    row.statistic, row.warn, row.critical, row.direction = "cusum", None, cusum.h, "above"
    return row


def run_check(plan_path: str, baseline_dir: str, data: dict[str, Any], *, time_column: str = contract.TIME_COLUMN,
              window: str | None = None, at: str | None = None,
              progress: Callable[[str], None] | None = None, engine: Any = None) -> CheckResult:
    """Every check of the plan on the window ending at ``at``, from ``data`` (stage to path or
    :class:`~stagewatch.data.engines.Location`) on ``engine`` (default DuckDB)."""
    from stagewatch.data import engines
    from stagewatch.data.attribution import attribute
    from stagewatch.plan import load_plan

    plan, _ = load_plan(plan_path)
    base = load_baseline(baseline_dir, plan)
    engine = engine or engines.make("duckdb")
    engine.baseline = base
    if window not in (None, "all") and not durations.is_duration(window):
        raise StagewatchError(f"--window {window!r} is not a duration", expected="e.g. 1h, 1d or all")
    by_stage = contract.checks_by_stage(plan)
    contract.check_stages(plan, data, plan_path)
    opened = [engine.open(stage, where, time_column, i) for i, (stage, where) in enumerate(engines.normal(data).items())]
    spans = {s.stage: scan.time_range(engine, s)[:2] for s in opened}  # one query per log, used twice
    moment = sources.parse_time(at, "--at")
    if moment is None:
        found = [last for _, last in spans.values() if last is not None]
        moment = max(found) if found else None
    rows: list[CheckRow] = []
    for source in opened:
        if progress:
            progress(source.stage)
        stage_ref = base["stages"].get(source.stage)
        metrics = by_stage.get(source.stage, [])
        if stage_ref is None:
            rows += [_row(m, source.stage, m.get("window", ""), "not_measured",
                          words="the baseline has no data for this stage; calibrate with --data for it")
                     for m in metrics]
            continue
        if moment is None:
            rows += [_row(m, source.stage, m.get("window", ""), "insufficient", n=0,
                          words="the log has no rows with a readable timestamp") for m in metrics]
            continue
        rows += _check_stage(engine, source, metrics, stage_ref, moment, window, spans[source.stage])
    service = sum(1 for s in plan["stages"] for m in s.get("metrics", [])
                  if contract.live(m) and m.get("layer") in ("input", "output") and not contract.in_log(m))
    result = CheckResult(at=moment, rows=rows, service_checks=service,
                         stages_without_data=sorted(set(by_stage) - set(data)), pipeline=plan.get("pipeline", ""),
                         plan=plan)
    result.attribution = attribute(plan, rows)
    return result


def exit_code(result: CheckResult) -> int:
    from stagewatch.errors import EXIT_CRITICAL, EXIT_FINDINGS, EXIT_OK

    counts = result.counts()
    if counts["critical"]:
        return EXIT_CRITICAL
    if counts["warn"] or counts["insufficient"] or counts["not_measured"]:
        return EXIT_FINDINGS
    return EXIT_OK
