"""Check results for people and machines: a terminal table (rich), Markdown, JSON and OpenMetrics."""

from __future__ import annotations

import json
import math
from typing import Any

from stagewatch.data.attribution import CAVEAT
from stagewatch.data.check import VERDICTS, CheckResult
from stagewatch.data.sources import format_time

MARK = {"ok": "ok", "warn": "! warn", "critical": "x critical", "insufficient": "? insufficient",
        "not_measured": "- not measured"}
STYLE = {"ok": "green", "warn": "yellow", "critical": "bold red", "insufficient": "magenta", "not_measured": "dim"}


def fmt(x: float | None) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    if x == 0:
        return "0"
    return f"{x:.3g}" if abs(x) >= 1e-3 else f"{x:.2e}"


def short_id(check_id: str, stage: str) -> str:
    """A check's id without its stage's prefix, for tables grouped by stage."""
    return check_id[len(stage) + 1:] if check_id.startswith(stage + ".") else check_id


def _threshold(warn: float | None, critical: float | None) -> str:
    return f"{fmt(warn)} / {fmt(critical)}"


def summary_line(result: CheckResult) -> str:
    counts = result.counts()
    parts = [f"{counts[v]} {v.replace('_', ' ')}" + (_critical_severities(result) if v == "critical" else "")
             for v in VERDICTS if counts[v]]
    at = format_time(result.at) or "no data"
    return f"{len(result.rows)} checks at {at}: " + ", ".join(parts)


def _critical_severities(result: CheckResult) -> str:
    """How the critical verdicts would reach people: the exit code says "critical" for both severities, so the
    summary says how many would page someone and how many would open a ticket."""
    critical = [r.severity for r in result.rows if r.verdict == "critical"]
    pages = critical.count("page")
    return f" ({pages} would page, {len(critical) - pages} would open a ticket)"


def attribution_lines(result: CheckResult) -> list[str]:
    if not result.attribution:
        return []
    lines = ["Likely origin" + ("s" if len(result.attribution) > 1 else "") + ":"]
    for group in result.attribution:
        lines.append(f"* {group['origin']} ({group['where']}): {group['explanation']}; "
                     f"{len(group['checks'])} check(s) alert there")
        for c in group["consequences"]:
            via = "; ".join(f"from {v['from']}: " + ("already in its output" if v["already_in_producer_output"]
                                                      else "not seen in its output")
                            for v in c["via"])
            also = f" (also below {', '.join(c['also_below'])})" if c["also_below"] else ""
            lines.append(f"    - likely consequence: {c['stage']}, {len(c['checks'])} check(s)"
                         + (f"; {via}" if via else "") + also)
    lines.append(CAVEAT)
    return lines


def to_json(result: CheckResult) -> str:
    doc = {
        "at": format_time(result.at),
        "summary": result.counts(),
        "checks": [_finite(r.to_dict()) for r in result.rows],
        "attribution": result.attribution,
        "measured_by_service": result.service_checks,
        "stages_without_data": result.stages_without_data,
    }
    return json.dumps(doc, indent=2, allow_nan=False) + "\n"


def _finite(d: dict[str, Any]) -> dict[str, Any]:
    return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in d.items()}


def _escape_md(text: str) -> str:
    from stagewatch.escape import markdown_cell

    return markdown_cell(text)


def to_markdown(result: CheckResult) -> str:
    lines = ["# stagewatch check", "", summary_line(result), "",
             "| check | verdict | severity | value | warn / critical | n | m | what moved |",
             "|---|---|---|---:|---:|---:|---:|---|"]
    for r in result.rows:
        lines.append(f"| {_escape_md(r.id)} | {MARK[r.verdict]} | {r.severity} | {fmt(r.value)} | {_threshold(r.warn, r.critical)} "
                     f"| {'' if r.n is None else f'{r.n:,}'} | {'' if r.m is None else f'{r.m:,}'} | "
                     f"{_escape_md(r.words)} |")
    attribution = attribution_lines(result)
    if attribution:
        lines += ["", "## Which stage moved first", ""] + [_escape_md(a) if not a.startswith(("*", "    -")) else
                                                         a[:2] + _escape_md(a[2:]) if a.startswith("*") else
                                                         "    - " + _escape_md(a[6:]) for a in attribution]
    lines += ["", _footer(result)]
    return "\n".join(lines) + "\n"


def _footer(result: CheckResult) -> str:
    notes = []
    if result.service_checks:
        notes.append(f"{result.service_checks} input/output checks are counted by the services' own "
                     "instrumentation (see instrumentation.md), not from logs")
    if result.stages_without_data:
        notes.append("no data given for " + ", ".join(result.stages_without_data))
    return "; ".join(notes)


def make_console() -> Any:
    """A rich console on stdout: the terminal's width on a terminal, 120 columns into a file or a pipe."""
    import sys

    from rich.console import Console

    return Console(highlight=False, width=None if sys.stdout.isatty() else 120)


def print_table(result: CheckResult, console: Any = None, only_alerts: bool = False) -> None:
    from rich import box
    from rich.markup import escape
    from rich.table import Table

    console = console or make_console()
    wide = console.width >= 120
    table = Table(title=summary_line(result), title_justify="left", show_lines=False, box=box.SIMPLE_HEAD,
                  show_edge=False, pad_edge=False)
    table.add_column("stage / check", no_wrap=True)
    table.add_column("verdict", no_wrap=True)
    table.add_column("severity", no_wrap=True)
    table.add_column("value", justify="right", no_wrap=True)
    table.add_column("warn / crit", justify="right", no_wrap=True)
    table.add_column("n", justify="right", no_wrap=True)
    if wide:
        table.add_column("what moved", overflow="fold", ratio=1)
    moved: list[tuple[str, str]] = []
    stage = None
    for r in result.rows:
        if only_alerts and r.verdict == "ok":
            continue
        if r.stage != stage:
            stage = r.stage
            table.add_row(f"[bold]{escape(stage)}[/]", "", "", "", "", "", *([""] if wide else []))
        name = short_id(r.id, r.stage)
        words = r.words if r.verdict != "ok" else ""
        table.add_row(f"  {escape(name)}", f"[{STYLE[r.verdict]}]{MARK[r.verdict]}[/]", r.severity, fmt(r.value),
                      _threshold(r.warn, r.critical), "" if r.n is None else f"{r.n:,}",
                      *([escape(words)] if wide else []))
        if words and not wide:
            moved.append((r.id, words))
    console.print(table, markup=True)
    if moved:
        console.print("What moved:", markup=False, style="bold")
        for check, words in moved:
            console.print(f"  {check}: {words}", markup=False)
    for line in attribution_lines(result):
        console.print(line, markup=False)
    footer = _footer(result)
    if footer:
        console.print(footer, markup=False, style="dim")


def to_openmetrics(result: CheckResult, pipeline: str) -> str:
    """``stagewatch_check_statistic`` per measured check, for a textfile collector or a push gateway."""
    from prometheus_client.core import GaugeMetricFamily

    family = GaugeMetricFamily("stagewatch_check_statistic",
                               "Statistic computed by `stagewatch check` on the latest window.",
                               labels=["pipeline", "stage", "check"])
    for r in result.rows:
        if r.value is not None and math.isfinite(r.value) and r.verdict not in ("not_measured",):
            # a CUSUM is published as S / h, so that the exported alert's limit is 1 whatever h the data gave
            value = r.value / r.critical if r.statistic == "cusum" and r.critical else r.value
            family.add_metric([pipeline, r.stage, r.id], value)
    return _exposition([family])


def _exposition(families: list[Any]) -> str:
    from prometheus_client.openmetrics.exposition import generate_latest

    class _Collector:
        def collect(self) -> Any:
            return families

    from prometheus_client import CollectorRegistry

    registry = CollectorRegistry()
    registry.register(_Collector())  # type: ignore[arg-type]
    return generate_latest(registry).decode()


def reference_openmetrics(baseline: dict[str, Any], plan: dict[str, Any]) -> str:
    """The reference gauges the Prometheus export reads, from a baseline."""
    from prometheus_client.core import GaugeMetricFamily

    from stagewatch import binned
    from stagewatch.data import contract

    pipeline = plan.get("pipeline", "")
    shares = GaugeMetricFamily("stagewatch_reference_share", "Reference share of a check (per bin for "
                               "distribution checks; no bin label for shares).", labels=None)
    rate = GaugeMetricFamily("stagewatch_reference_items_per_second", "Reference rate of a count check, items "
                             "per second.", labels=["pipeline", "stage", "check"])
    samples: list[tuple[dict[str, str], float]] = []
    for stage, metrics in contract.checks_by_stage(plan).items():
        block = baseline["stages"].get(stage)
        if not block:
            continue
        for metric in metrics:
            ref = block["checks"].get(metric["id"])
            if ref is None:
                continue
            labels = {"pipeline": pipeline, "stage": stage, "check": metric["id"]}
            if metric["statistic"] == "psi":  # the PromQL PSI smooths like binned.psi: publish smoothed shares
                for i, share in enumerate(binned.smoothed_shares(ref["counts"])):
                    samples.append(({**labels, "bin": str(i)}, float(share)))
            elif metric["statistic"] == "chi_square":
                total = sum(ref["counts"]) or 1
                for i, c in enumerate(ref["counts"]):
                    samples.append(({**labels, "bin": str(i)}, c / total))
            elif metric["statistic"] in ("proportion", "quantile"):
                samples.append((labels, ref["share"]))
            elif metric["statistic"] == "count" and block.get("rate_per_hour") is not None:
                rate.add_metric([pipeline, stage, metric["id"]], block["rate_per_hour"] / 3600.0)
    from prometheus_client.samples import Sample

    # Shares of distribution checks carry a bin label and shares of proportions do not: one family, two shapes.
    shares.samples.extend(Sample("stagewatch_reference_share", labels, value) for labels, value in samples)
    return _exposition([shares, rate])
