"""`demo`: the whole flow on the bundled packhouse grading line."""

from __future__ import annotations

from pathlib import Path

from stagewatch import yamlio
from stagewatch.exporters import EXPORTERS
from stagewatch.lint import lint_document
from stagewatch.plan import load_plan
from stagewatch.propose import propose
from stagewatch.render import render

DEMO = Path(__file__).resolve().parent / "examples" / "packhouse.yaml"


def run_demo(out_dir: str) -> list[str]:
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
    lines.append("next: edit status and note in the plan, re-run `stagewatch propose "
                 f"{pipeline_path} -o {plan_path}` to merge, and `stagewatch explain {plan_path} METRIC_ID` for "
                 "any number you doubt")
    return lines
