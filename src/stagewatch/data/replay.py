"""``stagewatch replay``: every check at every evaluation time of a period, as the export would evaluate it.

One scan per stage cuts the period into buckets of one cadence step; each check's window at each evaluation time
is a sum of buckets (cumulative sums), and its value for all evaluation times is computed at once from those
counts with the functions `check` uses. ``tumbling`` evaluates each check once per window, at multiples of its
window since the epoch (how the Prometheus export runs sized checks); ``1m`` evaluates every minute over a sliding
window. An episode is a run of firings that ends when the check has been quiet for one window.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import reduce
from typing import Any, Callable

import numpy as np
from scipy import stats as st

from stagewatch import durations
from stagewatch.data import contract, inject, scan, sequential, sources
from stagewatch.data.baseline import load_baseline
from stagewatch.data.check import CheckRow, Runnable, expected_rows, min_samples, prepare
from stagewatch.errors import StagewatchError

WEEK = 7 * 86400.0
CADENCES = ("tumbling", "1m")
MIN_WINDOWS = 20  # fewer independent windows than this: too few to judge a rate (common practice, from memory)
FIXED_LIMIT = "fixed limit, no planned rate"
NEVER_MEASURED = "never measured"  # every window held fewer samples than the statistic needs
NOISIER_P = 0.01  # a check is noisier than planned when its firings would be this unlikely under the plan


@dataclass
class CheckReplay:
    id: str
    stage: str
    severity: str
    window: str
    evaluations: int
    warn_firings: int
    critical_firings: int
    episodes: int
    insufficient: int
    weeks: float
    planned_critical_per_week: float | None
    planned_warn_per_week: float | None
    verdict: str
    factor: float | None
    times: np.ndarray = field(repr=False, default_factory=lambda: np.zeros(0))
    levels: np.ndarray = field(repr=False, default_factory=lambda: np.zeros(0, dtype=int))  # 0 ok 1 warn 2 crit
    values: np.ndarray = field(repr=False, default_factory=lambda: np.zeros(0))
    samples: np.ndarray = field(repr=False, default_factory=lambda: np.zeros(0))
    reference_samples: int | None = None
    first_critical_after: float | None = None
    detection_delay_s: float | None = None

    def per_week(self, n: int) -> float:
        return n / self.weeks if self.weeks else float("nan")

    def pages(self) -> int:
        return self.critical_firings if self.severity == "page" else 0

    def tickets(self) -> int:
        return self.warn_firings + (self.critical_firings if self.severity != "page" else 0)

    def to_dict(self) -> dict[str, Any]:
        out = {k: getattr(self, k) for k in ("id", "stage", "severity", "window", "evaluations", "warn_firings",
                                            "critical_firings", "episodes", "insufficient", "verdict", "factor",
                                            "planned_critical_per_week", "planned_warn_per_week")}
        out["critical_per_week"] = round(self.per_week(self.critical_firings), 4)
        out["warn_per_week"] = round(self.per_week(self.warn_firings), 4)
        if self.detection_delay_s is not None or self.first_critical_after is not None:
            out["detection_delay_s"] = self.detection_delay_s
        return out


@dataclass
class ReplayResult:
    start: float
    end: float
    cadence: str
    checks: list[CheckReplay]
    not_measured: list[CheckRow]
    budget_pages: float
    budget_tickets: float
    planned_pages: float | None
    planned_tickets: float | None
    injection: inject.Injection | None = None
    attribution: list[dict[str, Any]] = field(default_factory=list)
    plan: dict[str, Any] = field(default_factory=dict, repr=False)  # the plan replayed (reports name its checks)
    attribution_at: float | None = None

    @property
    def weeks(self) -> float:
        return (self.end - self.start) / WEEK

    def pages_per_week(self) -> float:
        return sum(c.pages() for c in self.checks) / self.weeks

    def tickets_per_week(self) -> float:
        return sum(c.tickets() for c in self.checks) / self.weeks

    def over_budget(self) -> bool:
        return self.pages_per_week() > self.budget_pages

    def tickets_over_budget(self) -> bool:
        return self.tickets_per_week() > self.budget_tickets


def _figure(shown: Any) -> float | None:
    """A figure as the plan shows it ("< 1e-6" counts as its bound), None when absent."""
    from stagewatch.sizing import number

    return None if shown is None else number(shown)


def _share(sizing: dict[str, Any], key: str) -> float | None:
    """The false alarms per week the plan's budget gave a check at one level: alpha x evaluations per week."""
    alpha, evaluations = _figure(sizing.get(key)), sizing.get("evaluations_per_week")
    return None if alpha is None or not evaluations else alpha * float(evaluations)


def _step(cadence: str, runnable: list[Runnable]) -> float:
    if cadence == "1m":
        return 60.0
    return float(reduce(math.gcd, [r.seconds for r in runnable if r.seconds]))


def _episodes(times: np.ndarray, firing: np.ndarray, window: float) -> int:
    t = times[firing]
    if t.size == 0:
        return 0
    return int(1 + np.sum(np.diff(t) > window))


def _verdict(observed: int, planned_per_week: float | None, weeks: float, windows: float) -> tuple[str, float | None]:
    if planned_per_week is None:  # a fixed limit: no sampling noise was planned, so there is no rate to compare
        return FIXED_LIMIT, None
    if windows < MIN_WINDOWS:
        return "too few windows to say", None
    expected = planned_per_week * weeks
    factor = (observed / expected) if expected > 0 else (math.inf if observed else 1.0)
    if observed and float(st.poisson.sf(observed - 1, expected)) < NOISIER_P:
        return "noisier than planned", factor
    return "as planned", factor


def _levels(r: Runnable, values: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(0 ok, 1 warn, 2 critical per evaluation; insufficient mask)."""
    metric = r.metric
    warn, critical = metric.get("warn"), metric.get("critical")
    if metric["statistic"] == "level":
        score = np.nan_to_num(values)
        crit = score >= max(critical, 1e-12) if critical is not None else np.zeros(score.shape, bool)
        wrn = score >= max(warn, 1e-12) if warn is not None else np.zeros(score.shape, bool)
        return np.where(crit, 2, np.where(wrn, 1, 0)), np.zeros(score.shape, bool)
    direction = metric.get("direction", "above")
    score = values if direction == "above" else -values if direction == "below" else np.abs(values)
    insufficient = np.isnan(values) | (n < min_samples(metric))
    with np.errstate(invalid="ignore"):
        crit = (score >= critical) if critical is not None else np.zeros(score.shape, bool)
        wrn = (score >= warn) if warn is not None else np.zeros(score.shape, bool)
    level = np.where(crit, 2, np.where(wrn, 1, 0))
    return np.where(insufficient, 0, level), insufficient


def _replay_stage(engine: Any, source: sources.Source, runnable: list[Runnable], stage_ref: dict[str, Any],
                  start: float, end: float, cadence: str) -> list[CheckReplay]:
    if not runnable:
        return []
    step = _step(cadence, runnable)
    end_aligned = math.floor(end / step) * step
    longest = max(r.seconds or 0 for r in runnable)
    first = start - longest  # windows that end early in the period reach back before it
    nb = int(round((end_aligned - first) / step))
    aggregates = [a for r in runnable for a in r.aggregates()]
    buckets = scan.run(engine, source, aggregates, start=end_aligned - nb * step, end=end_aligned, step=step)
    keys = [a.key for a in aggregates]
    matrix = np.zeros((nb, len(keys)))
    for b, row in buckets.items():
        i = nb - 1 - b
        if 0 <= i < nb:
            matrix[i] = [row[k] for k in keys]
    cumulative = np.vstack([np.zeros(len(keys)), np.cumsum(matrix, axis=0)])
    column = {k: j for j, k in enumerate(keys)}
    ends = end_aligned - (nb - 1 - np.arange(nb)) * step  # end time of bucket i
    expected_cum = None
    out = []
    weeks = (end - start) / WEEK
    for r in runnable:
        seconds = r.seconds or step
        k = int(round(seconds / step))
        idx = np.arange(k - 1, nb)
        idx = idx[ends[idx] > start]
        if cadence == "tumbling":
            idx = idx[np.isclose(np.mod(ends[idx], seconds), 0) | np.isclose(np.mod(ends[idx], seconds), seconds)]
        times = ends[idx]
        counts = {}
        for a in r.measure.aggregates(r.ref):
            j = column[f"{r.metric['id']}#{a.key}"]
            counts[a.key] = cumulative[idx + 1, j] - cumulative[idx + 1 - k, j]
        expected = None
        if r.metric["statistic"] == "count":
            if expected_cum is None:
                per_bucket = np.array([expected_rows(stage_ref, t - step, t) or 0.0 for t in ends])
                expected_cum = np.concatenate([[0.0], np.cumsum(per_bucket)])
            expected = expected_cum[idx + 1] - expected_cum[idx + 1 - k]
        values, n, m = r.measure.values(r.ref, counts, expected)
        levels, insufficient = _levels(r, values, n)
        sizing = r.metric.get("sizing") or {}
        planned_crit = _share(sizing, "alpha")
        planned_warn = _share(sizing, "warn_alpha")
        windows = (end - start) / seconds
        crit_n, warn_n = int(np.sum(levels == 2)), int(np.sum(levels == 1))
        episodes = _episodes(times, levels > 0, seconds)
        observed = crit_n if cadence == "tumbling" else _episodes(times, levels == 2, seconds)
        verdict, factor = _verdict(observed, planned_crit, weeks, windows)
        if idx.size and int(insufficient.sum()) == idx.size:  # quiet only because it never had the samples it needs
            verdict, factor = NEVER_MEASURED, None
        if planned_warn is not None and verdict not in ("too few windows to say", NEVER_MEASURED, FIXED_LIMIT):
            observed_w = warn_n if cadence == "tumbling" else _episodes(times, levels == 1, seconds)
            verdict_w, factor_w = _verdict(observed_w, planned_warn, weeks, windows)
            if verdict_w == "noisier than planned" and (verdict != "noisier than planned"
                                                        or (factor_w or 0) > (factor or 0)):
                verdict, factor = verdict_w, factor_w
        out.append(CheckReplay(id=r.metric["id"], stage=source.stage, severity=r.metric.get("severity", "ticket"),
                               window=r.window, evaluations=int(idx.size), warn_firings=warn_n,
                               critical_firings=crit_n, episodes=episodes, insufficient=int(insufficient.sum()),
                               weeks=weeks, planned_critical_per_week=planned_crit, planned_warn_per_week=planned_warn,
                               verdict=verdict, factor=None if factor is None else round(factor, 3),
                               times=times, levels=levels, values=values, samples=n, reference_samples=m))
        cusum = sequential.setup(r.metric, r.ref, stage_ref)
        if cusum is not None:
            out.append(_replay_cusum(r, source.stage, cusum, matrix, column, ends, start, end))
    return out


def _replay_cusum(r: Runnable, stage: str, cusum: Any, matrix: np.ndarray, column: dict[str, int],
                  ends: np.ndarray, start: float, end: float) -> CheckReplay:
    """The sequential rule of a share, item counts grouped by the replay's buckets, restarted after each alarm."""
    from stagewatch.cusum import binomial_cusum

    matches = matrix[:, column[f"{r.metric['id']}#matches"]]
    n = matrix[:, column[f"{r.metric['id']}#n"]]
    path, alarm = binomial_cusum(matches, n, cusum.p0, cusum.p1, cusum.h)
    keep = ends > start
    times, levels = ends[keep], np.where(alarm[keep], 2, 0)
    weeks = (end - start) / WEEK
    planned = cusum.items_per_week / cusum.arl0_items
    fired = int(alarm[keep].sum())
    windows = (end - start) / (cusum.arl0_items / cusum.items_per_week * WEEK) * MIN_WINDOWS  # run lengths seen
    verdict, factor = _verdict(fired, planned, weeks, windows)
    return CheckReplay(id=f"{r.metric['id']}#cusum", stage=stage,
                       severity=r.metric.get("severity", "ticket"), window="sequential", evaluations=int(keep.sum()),
                       warn_firings=0, critical_firings=fired, episodes=fired, insufficient=0, weeks=weeks,
                       planned_critical_per_week=round(planned, 6), planned_warn_per_week=None, verdict=verdict,
                       factor=None if factor is None else round(factor, 3), times=times, levels=levels,
                       values=path[keep], samples=n[keep], reference_samples=r.ref.get("n"))


def run_replay(plan_path: str, baseline_dir: str, data: dict[str, Any], *, start: str, end: str,
               cadence: str = "tumbling", time_column: str = contract.TIME_COLUMN,
               injection: str | None = None, progress: Callable[[str], None] | None = None,
               engine: Any = None) -> ReplayResult:
    """Every check at every evaluation time of ``start .. end`` from ``data`` (stage to path or
    :class:`~stagewatch.data.engines.Location`) on ``engine`` (default DuckDB)."""
    from stagewatch.data import engines
    from stagewatch.plan import load_plan

    if cadence not in CADENCES:
        raise StagewatchError(f"--cadence {cadence!r} is not known", expected=" or ".join(CADENCES))
    plan, _ = load_plan(plan_path)
    base = load_baseline(baseline_dir, plan)
    lo, hi = sources.parse_period(start, end)
    assert lo is not None and hi is not None  # both are required options
    change = inject.parse(injection) if injection else None
    if change and change.stage not in data:
        raise StagewatchError(f"--inject names stage '{change.stage}', which has no --data", expected="a stage given with --data")
    by_stage = contract.checks_by_stage(plan)
    contract.check_stages(plan, data, plan_path)
    engine = engine or engines.make("duckdb")
    engine.baseline = base
    checks: list[CheckReplay] = []
    unmeasured: list[CheckRow] = []
    for index, (stage, where) in enumerate(engines.normal(data).items()):
        if progress:
            progress(stage)
        source = engine.open(stage, where, time_column, index)
        stage_ref = base["stages"].get(stage)
        if stage_ref is None:
            continue
        if change and change.stage == stage:
            source = inject.apply(engine, source, change, stage_ref.get("columns", {}).get(change.column, {}))
        rows, runnable = prepare(source, by_stage.get(stage, []), stage_ref, None)
        unmeasured += rows
        checks += _replay_stage(engine, source, runnable, stage_ref, lo, hi, cadence)
    budget = plan.get("budget") or {}
    result = ReplayResult(start=lo, end=hi, cadence=cadence, checks=checks, not_measured=unmeasured,
                          budget_pages=float(plan.get("false_alarms_per_week", 1)),
                          budget_tickets=float(plan.get("false_tickets_per_week", 5)),
                          planned_pages=_figure(budget.get("expected_false_pages_per_week")),
                          planned_tickets=_figure(budget.get("expected_false_tickets_per_week")), injection=change,
                          plan=plan)
    if change:
        _detection(result, plan)
    return result


def _detection(result: ReplayResult, plan: dict[str, Any]) -> None:
    change = result.injection
    assert change is not None
    detect(result, plan, change.at, {c.id for c in affected(result, plan)})


def detect(result: ReplayResult, plan: dict[str, Any], at: float, watched: set[str] | None = None
           ) -> list[CheckReplay]:
    """Delay from a change at ``at`` to each check's first critical firing; attribution at the first one among
    ``watched`` (every check when None). Returns the checks that fired critical after ``at``."""
    from stagewatch.data.attribution import attribute

    first_any = None
    fired = []
    for c in result.checks:
        after = (c.times >= at) & (c.levels == 2)
        if after.any():
            c.first_critical_after = float(c.times[after][0])
            c.detection_delay_s = c.first_critical_after - at
            fired.append(c)
            if (watched is None or c.id in watched) and (first_any is None or c.first_critical_after < first_any):
                first_any = c.first_critical_after
    if first_any is None:
        return fired
    metrics = {m["id"]: m for ms in contract.checks_by_stage(plan).values() for m in ms}
    rows = []
    for c in result.checks:
        upto = c.times <= first_any
        if not upto.any():
            continue
        metric = metrics[c.id.split("#")[0]]
        rows.append(CheckRow(id=c.id, stage=c.stage, layer=metric["layer"], statistic=metric["statistic"],
                             window=c.window, verdict=("ok", "warn", "critical")[int(c.levels[upto][-1])],
                             columns=contract.columns_of(metric["reads"]), edge=metric.get("edge")))
    result.attribution = attribute(plan, rows)
    result.attribution_at = first_any
    return fired


def affected(result: ReplayResult, plan: dict[str, Any]) -> list[CheckReplay]:
    """The checks that read the injected column on the injected stage (or count its rows, for volume)."""
    change = result.injection
    if change is None:
        return []
    reads = {m["id"]: m["reads"] for ms in contract.checks_by_stage(plan).values() for m in ms}
    out = []
    for c in result.checks:
        if c.stage != change.stage:
            continue
        own = reads.get(c.id.split("#")[0], {})
        if change.column in contract.columns_of(own) or (change.kind == "volume" and own.get("condition") == "rows"):
            out.append(c)
    return out


def exit_code(result: ReplayResult) -> int:
    from stagewatch.errors import EXIT_FINDINGS, EXIT_OK

    return EXIT_FINDINGS if result.over_budget() else EXIT_OK


def duration_words(seconds: float | None) -> str:
    if seconds is None:
        return "not detected"
    return durations.format(max(60, round(seconds / 60) * 60))
