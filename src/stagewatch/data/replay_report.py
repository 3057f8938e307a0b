"""Replay results for people and machines: a terminal table with a timeline per check (rich), Markdown, JSON."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np

from stagewatch.data.attribution import CAVEAT
from stagewatch.data.replay import NEVER_MEASURED, ReplayResult, affected, duration_words
from stagewatch.data.report import attribution_lines, fmt, make_console
from stagewatch.data.sources import format_time

DAY = 86400.0
TIMELINE_MARKS = ".wC"  # quiet, warn, critical; a blank is a day without an evaluation


def timeline(times: np.ndarray, levels: np.ndarray, start: float, end: float) -> str:
    """One character per day: the worst level the check reached that day."""
    days = max(1, int(math.ceil((end - start) / DAY)))
    worst = np.full(days, -1)
    if times.size:
        day = np.clip(((times - start - 1e-9) // DAY).astype(int), 0, days - 1)
        np.maximum.at(worst, day, levels)
    return "".join(" " if w < 0 else TIMELINE_MARKS[w] for w in worst)


def budget_badge(result: ReplayResult) -> tuple[str, str]:
    """The replay judged against both budgets, as (verdict, words): pages over budget is critical, tickets over
    budget alone is warn, both within is ok; the words name what was judged."""
    pages, tickets = result.over_budget(), result.tickets_over_budget()
    if pages and tickets:
        return "critical", "pages and tickets over budget"
    if pages:
        return "critical", "pages over budget, tickets within"
    if tickets:
        return "warn", "tickets over budget, pages within"
    return "ok", "pages and tickets within budget"


def summary_lines(result: ReplayResult) -> list[str]:
    weeks = result.weeks
    lines = [f"replayed {len(result.checks)} checks from {format_time(result.start)} to {format_time(result.end)} "
             f"({weeks:.3g} weeks, {result.cadence} evaluation)",
             f"pages per week: {result.pages_per_week():.3g} replayed, {fmt(result.planned_pages)} planned from "
             f"sampling noise alone, budget {result.budget_pages:g}"
             + ("  OVER BUDGET" if result.over_budget() else ""),
             f"tickets per week: {result.tickets_per_week():.3g} replayed, {fmt(result.planned_tickets)} planned, "
             f"budget {result.budget_tickets:g}" + ("  OVER BUDGET" if result.tickets_over_budget() else "")]
    noisy = [c for c in result.checks if c.verdict == "noisier than planned"]
    if noisy:
        lines.append(f"{len(noisy)} check(s) noisier than planned; noisiest: " + ", ".join(
            f"{c.id} ({factor_words(c.factor)})" for c in sorted(noisy, key=lambda c: -(c.factor or 0))[:3]))
    unmeasured = [c for c in result.checks if c.verdict == NEVER_MEASURED]
    if unmeasured:
        lines.append(f"{len(unmeasured)} check(s) never measured: every window held fewer samples than the statistic "
                     "needs (its quiet timeline is not an all clear): " + ", ".join(c.id for c in unmeasured[:5])
                     + (" ..." if len(unmeasured) > 5 else ""))
    if result.not_measured:
        lines.append(f"{len(result.not_measured)} check(s) not measured (see `stagewatch check` for why)")
    return lines


def injection_lines(result: ReplayResult, plan: dict[str, Any]) -> list[str]:
    change = result.injection
    if change is None:
        return []
    lines = [f"injected {change.kind} {change.size} into {change.stage}.{change.column} from "
             f"{format_time(change.at)}:"]
    for c in affected(result, plan):
        lines.append(f"  {c.id}: " + ("detected after " + duration_words(c.detection_delay_s)
                                      if c.detection_delay_s is not None else "not detected in the period"))
    if result.attribution:
        lines.append(f"at the first critical firing ({format_time(result.attribution_at)}), attribution names: "
                     + ", ".join(g["origin"] for g in result.attribution))
    return lines


def to_json(result: ReplayResult, plan: dict[str, Any]) -> str:
    doc: dict[str, Any] = {"from": format_time(result.start), "to": format_time(result.end), "cadence": result.cadence,
           "weeks": round(result.weeks, 4),
           "pipeline": {"pages_per_week": round(result.pages_per_week(), 4),
                        "tickets_per_week": round(result.tickets_per_week(), 4),
                        "planned_pages_per_week": result.planned_pages,
                        "planned_tickets_per_week": result.planned_tickets,
                        "budget_pages_per_week": result.budget_pages,
                        "budget_tickets_per_week": result.budget_tickets,
                        "over_budget": result.over_budget(),
                        "tickets_over_budget": result.tickets_over_budget()},
           "checks": [{**c.to_dict(), "timeline": timeline(c.times, c.levels, result.start, result.end)}
                      for c in result.checks],
           "not_measured": [r.id for r in result.not_measured]}
    if result.injection:
        doc["injection"] = {"text": result.injection.text,
                            "detection": {c.id: c.detection_delay_s for c in affected(result, plan)},
                            "attribution": result.attribution, "attribution_at": format_time(result.attribution_at)}
    return json.dumps(doc, indent=2, allow_nan=False, default=lambda x: None) + "\n"


def planned(x: float | None) -> str:
    """A planned rate as the plan shows it: "< 1e-6" where the plan said so (it counts as 1e-6 in sums)."""
    from stagewatch.sizing import SMALLEST_SHOWN

    return "< 1e-6" if x is not None and 0 < x <= SMALLEST_SHOWN else fmt(x)


def factor_words(factor: float | None) -> str:
    if factor is None:
        return ""
    return "x>1000" if factor > 1000 else f"x{factor:.3g}"


def verdict_words(c: Any, short: bool = False) -> str:
    if c.verdict == "noisier than planned":
        return ("noisier " if short else "noisier than planned ") + factor_words(c.factor)
    if short and c.verdict == "too few windows to say":
        return "too few windows"
    return c.verdict


def _row_cells(c: Any, result: ReplayResult) -> list[str]:
    return [c.id, c.window, f"{c.evaluations:,}", str(c.warn_firings), str(c.critical_firings), str(c.episodes),
            fmt(c.per_week(c.critical_firings)), planned(c.planned_critical_per_week), verdict_words(c),
            timeline(c.times, c.levels, result.start, result.end)]


HEADERS = ["check", "window", "evaluations", "warn", "critical", "episodes", "critical/week", "budget share/week",
           "verdict", "timeline (a day per mark)"]


def to_markdown(result: ReplayResult, plan: dict[str, Any]) -> str:
    from stagewatch.data.report import _escape_md

    lines = ["# stagewatch replay", ""] + [f"- {_escape_md(s)}" for s in summary_lines(result)] + [""]
    lines += ["| " + " | ".join(HEADERS) + " |", "|" + "---|" * len(HEADERS)]
    for c in result.checks:
        cells = _row_cells(c, result)
        cells[0] = _escape_md(cells[0])
        cells[-1] = "`" + cells[-1] + "`"
        lines.append("| " + " | ".join(cells) + " |")
    extra = injection_lines(result, plan)
    if extra:
        lines += ["", "## Injected change", ""] + [f"- {_escape_md(x.strip())}" for x in extra]
    if result.attribution:
        lines += ["", CAVEAT]
    return "\n".join(lines) + "\n"


def print_table(result: ReplayResult, plan: dict[str, Any], console: Any = None) -> None:
    from rich import box
    from rich.markup import escape
    from rich.table import Table

    console = console or make_console()
    for line in summary_lines(result):
        console.print(line, markup=False, style="bold red" if "OVER BUDGET" in line else None)
    wide = console.width >= 110
    table = Table(box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False)
    table.add_column("stage / check", no_wrap=True)
    table.add_column("warn/crit", justify="right", no_wrap=True)
    table.add_column("crit/wk", justify="right", no_wrap=True)
    table.add_column("verdict", no_wrap=True)
    if wide:
        table.add_column("per day", no_wrap=True)
    timelines = Table(box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False)
    timelines.add_column("stage / check", no_wrap=True)
    timelines.add_column("per day", no_wrap=True)
    stage = None
    for c in result.checks:
        line = timeline(c.times, c.levels, result.start, result.end)
        if c.stage != stage:
            stage = c.stage
            table.add_row(f"[bold]{escape(stage)}[/]", "", "", "", *([""] if wide else []))
            timelines.add_row(f"[bold]{escape(stage)}[/]", "")
        verdict = escape(verdict_words(c, short=True))
        if c.verdict == "noisier than planned":
            verdict = f"[yellow]{verdict}[/]"
        name = "  " + escape(c.id.split(".", 1)[1])
        table.add_row(name, f"{c.warn_firings}/{c.critical_firings}", fmt(c.per_week(c.critical_firings)), verdict,
                      *([line] if wide else []))
        timelines.add_row(name, line)
    console.print(table)
    console.print("per day: the worst level of each day, . quiet, w warn, C critical (blank: not evaluated)",
                  markup=False, style="dim")
    if not wide:
        console.print(timelines)
    for line in injection_lines(result, plan):
        console.print(line, markup=False)
    if result.attribution:
        for line in attribution_lines(result):  # type: ignore[arg-type]
            console.print(line, markup=False)


def delay_table(rows: list[tuple[str, dict[str, float | None]]], fmt_: str) -> str:
    """Detection delay by change size: one row per size, one column per check that reads the changed column."""
    checks = sorted({c for _, delays in rows for c in delays})
    if fmt_ == "json":
        return json.dumps([{"change": change, "detection_delay_s": delays} for change, delays in rows], indent=2) + "\n"
    header = ["change", *checks]
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for change, delays in rows:
        lines.append("| " + " | ".join([change.split("=", 1)[1], *(duration_words(delays.get(c)) for c in checks)])
                     + " |")
    return "\n".join(lines) + "\n"
