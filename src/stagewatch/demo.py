"""`demo`: the whole flow on the bundled packhouse grading line."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from stagewatch import yamlio
from stagewatch.exporters import EXPORTERS
from stagewatch.lint import lint_document
from stagewatch.plan import load_plan
from stagewatch.propose import propose
from stagewatch.render import render

if TYPE_CHECKING:
    from stagewatch.data.check import CheckResult

DEMO = Path(__file__).resolve().parent / "examples" / "packhouse.yaml"


def run_demo(out_dir: str) -> tuple[list[str], "CheckResult"]:
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
    plan, doc = load_plan(str(plan_path))  # read back once, as every other command would read it
    findings = lint_document(doc)
    lines.append(f"lint {plan_path}: " + ("clean" if not findings else f"{len(findings)} finding(s)"))
    lines.extend(f"  {f}" for f in findings)
    for path in render(plan, out):
        lines.append(f"wrote {path}: the plan for review (Markdown with a Mermaid diagram)")
    lines.extend(EXPORTERS["prometheus"](plan, str(out / "prometheus")))
    lines.extend(EXPORTERS["checks"](plan, str(out / "checks.json")))
    result, data_lines = _data_side(plan, str(plan_path), out)
    lines.extend(data_lines)
    lines.append("next: edit status and note in the plan, re-run `stagewatch propose "
                 f"{pipeline_path} -o {plan_path}` to merge, and `stagewatch explain {plan_path} METRIC_ID` for "
                 "any number you doubt")
    return lines, result


def _data_side(plan: dict, plan_path: str, out: Path) -> tuple["CheckResult", list[str]]:
    """Demo logs (five weeks), a baseline from the first four, and a check of the latest window."""
    from stagewatch.data import report
    from stagewatch.data.baseline import calibrate
    from stagewatch.data.check import run_check
    from stagewatch.demo_logs import DAYS, REFERENCE_DAYS, REFERENCE_END, iso, write_logs

    lines = []
    logs = out / "logs"
    data = {s["id"]: str(logs / f"{s['id']}.parquet") for s in plan["stages"]}
    if all(Path(p).is_file() for p in data.values()):
        lines.append(f"using the demo logs already in {logs}")
    else:
        write_logs(plan, str(logs))
        lines.append(f"wrote {logs}/: {DAYS} days of demo logs per stage (Parquet, invented data with a daily "
                     "cycle; on the last days the frame gate is retuned)")
    baseline = out / "baseline"
    lines.extend(calibrate(plan_path, data, str(baseline), end=iso(REFERENCE_END)))
    lines.append(f"calibrated on the first {REFERENCE_DAYS} days")
    result = run_check(plan_path, str(baseline), data)
    for name, text in (("check.md", report.to_markdown(result)), ("check.json", report.to_json(result))):
        yamlio.write_atomic(out / name, text)
        lines.append(f"wrote {out / name}: the check of the latest window")
    cmd = " ".join(f"--data {k}={v}" for k, v in data.items())
    lines.append(f"check again: stagewatch check {plan_path} --baseline {baseline} {cmd}")
    return result, lines
