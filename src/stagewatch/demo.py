"""`demo`: the whole flow on the bundled packhouse grading line, from the description to a replay of its logs."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from stagewatch import yamlio
from stagewatch.exporters import EXPORTERS
from stagewatch.lint import lint_document
from stagewatch.plan import load_plan
from stagewatch.propose import propose
from stagewatch.render import render
from stagewatch.render_html import render as render_html

if TYPE_CHECKING:
    from stagewatch.data.check import CheckResult

DEMO = Path(__file__).resolve().parent / "examples" / "packhouse.yaml"


def run_demo(out_dir: str) -> tuple[list[str], "CheckResult"]:
    """Plan, logs, baseline with thresholds from data, the tuned plan and its exports, a check, two replays."""
    from stagewatch.data.baseline import add_thresholds, calibrate
    from stagewatch.demo_logs import DAYS, REFERENCE_DAYS, REFERENCE_END, iso, write_logs

    out = Path(out_dir)
    lines = []
    pipeline_path = out / "pipeline.yaml"
    if pipeline_path.exists():
        lines.append(f"using the pipeline description already in {pipeline_path} (your edits stay)")
    else:
        yamlio.write_atomic(pipeline_path, DEMO.read_text(encoding="utf-8"))
        lines.append(f"wrote {pipeline_path}: the demo pipeline, a fruit packhouse grading line (7 stages)")
    plan_path = out / "plan.yaml"
    _, rep = propose(str(pipeline_path), str(plan_path))
    assert rep is not None  # written to a file, so there is a report
    lines.extend(rep.lines())

    plan, _ = load_plan(str(plan_path))
    logs = out / "logs"
    data = {s["id"]: str(logs / f"{s['id']}.parquet") for s in plan["stages"]}
    if all(Path(p).is_file() for p in data.values()):
        lines.append(f"using the demo logs already in {logs}")
    else:
        write_logs(plan, str(logs))
        lines.append(f"wrote {logs}/: {DAYS} days of demo logs per stage (Parquet, invented data with a daily "
                     "cycle; on the last days the frame gate is retuned)")
    baseline = out / "baseline"
    lines.extend(calibrate(str(plan_path), data, str(baseline), end=iso(REFERENCE_END)))
    lines.extend(add_thresholds(str(plan_path), str(baseline), data, time_column="timestamp"))
    _, rep = propose(str(pipeline_path), str(plan_path), baseline_dir=str(baseline))
    lines.append(f"re-proposed {plan_path} with --baseline {baseline}: thresholds raised where the first "
                 f"{REFERENCE_DAYS} days need it to hold the budget")

    plan, doc = load_plan(str(plan_path))  # read back once, as every other command would read it
    findings = lint_document(doc)
    lines.append(f"lint {plan_path}: " + ("clean" if not findings else f"{len(findings)} finding(s)"))
    lines.extend(f"  {f}" for f in findings)
    for path in render(plan, out):
        lines.append(f"wrote {path}: the plan for review (Markdown with a Mermaid diagram)")
    for path in render_html(plan, out):
        lines.append(f"wrote {path}: the plan as one HTML page (the pipeline drawn, open decisions first)")
    lines.extend(EXPORTERS["prometheus"](plan, str(out / "prometheus")))
    lines.extend(EXPORTERS["checks"](plan, str(out / "checks.json")))
    result, data_lines = _check_and_replay(plan, str(plan_path), out, data, str(baseline))
    lines.extend(data_lines)
    lines.append("next: edit status and note in the plan, re-run `stagewatch propose "
                 f"{pipeline_path} -o {plan_path}` to merge, and `stagewatch explain {plan_path} METRIC_ID` for "
                 "any number you doubt")
    return lines, result


def _check_and_replay(plan: dict, plan_path: str, out: Path, data: dict[str, str], baseline: str
                      ) -> tuple["CheckResult", list[str]]:
    """A check of the latest window, a replay of the reference weeks and one of the week the gate changed."""
    from stagewatch.data import replay_report, report
    from stagewatch.data.check import run_check
    from stagewatch.data.html_report import render_check, render_replay
    from stagewatch.data.replay import detect, run_replay
    from stagewatch.data.sources import format_time
    from stagewatch.demo_logs import CHANGE, REFERENCE_END, START, iso

    lines = []
    result = run_check(plan_path, baseline, data)
    for name, text in (("check.md", report.to_markdown(result)), ("check.json", report.to_json(result)),
                       ("check.html", render_check(result))):
        yamlio.write_atomic(out / name, text)
        lines.append(f"wrote {out / name}: the check of the latest window")
    reference = run_replay(plan_path, baseline, data, start=iso(START), end=iso(REFERENCE_END))
    for name, text in (("replay.md", replay_report.to_markdown(reference, plan)),
                       ("replay.html", render_replay(reference, plan))):
        yamlio.write_atomic(out / name, text)
        lines.append(f"wrote {out / name}: every check replayed over the reference weeks")
    lines.extend("  " + line for line in replay_report.summary_lines(reference))
    last = run_replay(plan_path, baseline, data, start=iso(REFERENCE_END), end=iso(CHANGE + 32 * 3600))
    found = detect(last, plan, CHANGE)
    for name, text in (("replay-change.md", replay_report.to_markdown(last, plan)),
                       ("replay-change.html", render_replay(last, plan))):
        yamlio.write_atomic(out / name, text)
        lines.append(f"wrote {out / name}: the week the frame gate was retuned ({format_time(CHANGE)})")
    for c in sorted(found, key=lambda c: c.detection_delay_s or 0)[:5]:
        lines.append(f"  first critical: {c.id} after {replay_report.duration_words(c.detection_delay_s)}")
    if last.attribution:
        lines.append(f"  attribution at {format_time(last.attribution_at)} names: "
                     + ", ".join(g["origin"] for g in last.attribution))
    cmd = " ".join(f"--data {k}={v}" for k, v in data.items())
    lines.append(f"check again: stagewatch check {plan_path} --baseline {baseline} {cmd}")
    return result, lines
