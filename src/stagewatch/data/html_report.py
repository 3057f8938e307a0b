"""Check and replay results as one self-contained HTML page each: the pipeline marked with verdicts and the likely
origin, the reference and window distributions of every alerting check, and (replay) a timeline of firings."""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from stagewatch import charts, diagram
from stagewatch.data.attribution import CAVEAT
from stagewatch.data.check import CheckResult, CheckRow
from stagewatch.data.report import short_id, summary_line
from stagewatch.data.sources import format_time
from stagewatch.render_html import page

WORST_FIRST = ("critical", "warn", "insufficient", "not_measured", "ok")
LEVELS = ("ok", "warn", "critical")
ALERTING = ("warn", "critical")


def _worst(verdicts: Sequence[str]) -> str | None:
    return next((v for v in WORST_FIRST if v in verdicts), None)


def _attribution_marks(attribution: list[dict[str, Any]]) -> tuple[set[str], set[str], dict[tuple[str, str], str]]:
    """Origin stages, their consequences, and hand-offs an origin was placed on."""
    origins = {g["stage"] for g in attribution}
    consequences = {c["stage"] for g in attribution for c in g["consequences"]} - origins
    edges = {}
    for g in attribution:
        if g["where"] == "hand-off":
            for pair in g["origin"].split(", "):
                producer, _, consumer = pair.partition(" -> ")
                edges[(producer, consumer)] = "origin"
    return origins, consequences, edges


def chart_for(row: CheckRow) -> charts.Chart | None:
    """The reference against the window for one check, in the form its statistic reads (None: nothing to draw)."""
    d = row.detail or {}
    if "reference_counts" in d and "window_counts" in d:
        if "categories" in d:
            return charts.paired_bars(d["reference_counts"], d["window_counts"], labels=[str(c) for c in d["categories"]])
        ref, win, edges = charts.group_bins(d["reference_counts"], d["window_counts"], d.get("edges", []))
        return charts.paired_bars(ref, win, edges=edges)
    if "reference_mean" in d and d.get("mean") is not None:
        return charts.number_line(d["reference_mean"], d.get("reference_sd") or 0.0, d["mean"])
    if "reference_share" in d and "share" in d:
        return charts.two_bars(d["reference_share"], d["share"], ("reference share", "window share"))
    if "expected" in d and "rows" in d and d["expected"] is not None:
        return charts.two_bars(d["expected"], d["rows"], ("rows expected", "rows in window"), unit="rows")
    return None


def _cover(c: Any) -> float:
    """The span one evaluation judges: its window, or the step between evaluations for a sequential rule."""
    from stagewatch import durations

    if durations.is_duration(c.window):
        return float(durations.parse(c.window))
    return float(np.median(np.diff(c.times))) if c.times.size > 1 else 0.0


def render_check(result: CheckResult) -> str:
    plan = result.plan
    by_stage: dict[str, list[CheckRow]] = {}
    for r in result.rows:
        by_stage.setdefault(r.stage, []).append(r)
    marks = {}
    for stage, rows in by_stage.items():
        v = _worst([r.verdict for r in rows])
        if v:
            alerting = sum(1 for r in rows if r.verdict in ALERTING)
            marks[stage] = {"verdict": v, "word": v.replace("_", " ") + (f" ({alerting} alerting)" if alerting else "")}
    origins, consequences, edge_marks = _attribution_marks(result.attribution)
    picture = diagram.build(plan, marks, origins, consequences, edge_marks)
    alerting_rows = [r for r in result.rows if r.verdict in ALERTING]
    alerting_rows.sort(key=lambda r: (WORST_FIRST.index(r.verdict), r.stage not in origins))
    return page("check.html.j2", result=result, pipeline=result.pipeline or plan.get("pipeline", ""),
                at=format_time(result.at) or "no data", summary=summary_line(result), counts=result.counts(),
                diagram=picture, alerting=[(r, chart_for(r)) for r in alerting_rows],
                stages=[(s, by_stage[s], marks.get(s)) for s in [x["id"] for x in plan["stages"]] if s in by_stage],
                short=short_id, caveat=CAVEAT, origins=origins)


def render_replay(result: Any, plan: dict[str, Any]) -> str:
    """The replay page; ``result`` is a :class:`stagewatch.data.replay.ReplayResult`."""
    from stagewatch.data.replay_report import (budget_badge, factor_words, injection_lines, planned,
                                                 summary_lines)

    by_stage: dict[str, list[Any]] = {}
    for c in result.checks:
        by_stage.setdefault(c.stage, []).append(c)
    marks = {}
    for stage, checks in by_stage.items():
        worst = max((int(c.levels.max()) if c.levels.size else 0) for c in checks)
        fired = sum(1 for c in checks if c.levels.size and c.levels.max() == worst and worst > 0)
        word = {0: "quiet", 1: f"warn fired ({fired})", 2: f"critical fired ({fired})"}[worst]
        marks[stage] = {"verdict": LEVELS[worst], "word": word}
    origins, consequences, edge_marks = _attribution_marks(result.attribution)
    picture = diagram.build(plan, marks, origins, consequences, edge_marks)
    rows = []
    for c in result.checks:
        rows.append({"check": c, "short": short_id(c.id, c.stage),
                     "timeline": charts.timeline(c.times, c.levels, result.start, result.end, _cover(c)),
                     "per_week": c.per_week(c.critical_firings), "planned": planned(c.planned_critical_per_week),
                     "factor": factor_words(c.factor),
                     "worst": LEVELS[int(c.levels.max())] if c.levels.size else "ok"})
    return page("replay.html.j2", result=result, pipeline=plan.get("pipeline", ""), diagram=picture,
                summary=summary_lines(result), injection=[x.strip() for x in injection_lines(result, plan)],
                stages=[(s, [r for r in rows if r["check"].stage == s], marks.get(s))
                        for s in [x["id"] for x in plan["stages"]] if s in by_stage],
                start=format_time(result.start), end=format_time(result.end),
                axis=charts.day_axis(result.start, result.end),
                attribution_at=format_time(result.attribution_at), caveat=CAVEAT, origins=origins,
                budget=budget_badge(result))
