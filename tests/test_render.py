"""The Markdown plan: every stage, every hand-off, open decisions, and hostile text kept inert."""

from __future__ import annotations

import re

import yaml

from conftest import SMALL, all_pipelines
from stagewatch.plan import compose
from stagewatch.render import md_cell, mermaid_label, render_markdown
from stagewatch.spec import load_pipeline


def test_demo_render_has_all_sections():
    plan = compose(load_pipeline(str(all_pipelines()[0])))
    text = render_markdown(plan)
    for heading in ("## Summary", "## Pipeline", "```mermaid", "## Hand-offs", "## Stages", "## Whole pipeline",
                    "## Open decisions"):
        assert heading in text
    for stage in plan["stages"]:
        assert f"### `{stage['id']}`" in text
        for up in stage.get("upstream", []):
            assert re.search(rf"\| `{up}` → `{stage['id']}` \| `\w+", text)
    assert "starting points" in text
    for layer in ("Software", "Input", "Output"):
        assert f"#### {layer} metrics" in text


def test_hostile_text_stays_inert(write):
    hostile = SMALL.replace("  - id: scorer\n", "  - id: scorer\n    description: 'a | b <script>alert(1)</script>"
                                                  " \"]; click x \"javascript:alert(1)\"'\n")
    text = render_markdown(compose(load_pipeline(str(write("p.yaml", hostile)))))
    assert "<script>" not in text
    assert "a \\| b \\<script\\>" in text  # backslash escapes: literal in CommonMark
    assert md_cell("x|y\nz") == "x\\|y z"
    assert '"' not in mermaid_label('a"]; click')
    assert "]" not in mermaid_label('a"]; click')


def test_rendered_counts_match_the_plan(write):
    plan = compose(load_pipeline(str(write("p.yaml", SMALL))))
    text = render_markdown(plan)
    n = sum(len(s["metrics"]) for s in plan["stages"]) + len(plan["pipeline_metrics"])
    assert f"{n} metrics: {n} proposed" in text
    assert yaml.safe_load(yaml.safe_dump(plan)) == plan
