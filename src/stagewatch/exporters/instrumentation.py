"""instrumentation.md: the series each stage must emit for the exported rules, in words a service owner reads."""

from __future__ import annotations

from typing import Any

from stagewatch.escape import markdown_code, markdown_text


def instrumentation_markdown(instr: dict[str, Any]) -> str:
    lines = [f"# Instrumentation for {markdown_text(instr['pipeline'])}", "",
             "What each stage must emit for the exported rules to work. Every series carries the labels `pipeline` "
             "and `stage`; per-check series also carry `check` (the plan metric id). Reference gauges are "
             "published from calibrated reference data; `stagewatch_check_statistic` by the data checks.", "",
             "**Create every series at 0 when the stage starts**: every `bin` of "
             "`stagewatch_check_bin_items_total` (every bin edge and every category the reference knows), every "
             "counter of every check. A counter that first appears with its first item loses that item to "
             "`increase()`; the rules read a bin whose series was never created as an empty bin, but only while "
             "its reference share is published.", "",
             "**PSI reference shares are smoothed**: publish (count + 0.5) / (total + 0.5 x bins) per bin, the "
             "shares `stagewatch.binned.smoothed_shares` gives; the rules add the same 0.5 to every window count, so "
             "the exported PSI equals the plan's PSI on the same counts.", "",
             "| Metric | Type | Labels | What it is |", "|---|---|---|---|"]
    for fam in instr["families"]:
        lines.append(f"| `{fam['name']}` | {fam['type']} | {', '.join(fam['labels'])} | {fam['help']} |")
    lines += ["", "## Per stage", ""]
    by_stage: dict[str, list[tuple[str, dict[str, Any]]]] = {}
    for fam in instr["families"]:
        for use in fam["uses"]:
            by_stage.setdefault(use["stage"], []).append((fam["name"], use))
    for stage in instr["stages"]:
        uses = by_stage.get(stage, [])
        if not uses:
            continue
        lines += [f"### {markdown_code(stage)}", "", "| Metric | check | Notes |", "|---|---|---|"]
        for name, use in uses:
            notes = []
            if "bins" in use:
                notes.append(f"{use['bins']} bins, `bin` = 0..{int(use['bins']) - 1}")
            if "bucket_le" in use:
                notes.append(f"needs bucket le={use['bucket_le']}")
            if "field" in use:
                notes.append(f"field {markdown_code(use['field'])}")
            if "reference_share" in use:
                notes.append(f"reference share until calibrated: {use['reference_share']:g}")
            if use.get("at_label_arrival"):
                notes.append("increment when the label arrives, for labelled items only")
            check = use["check"] if name not in ("stagewatch_requests_total", "stagewatch_request_errors_total",
                                                 "stagewatch_request_duration_seconds") else "(none)"
            lines.append(f"| `{name}` | {markdown_code(check)} | {'; '.join(notes)} |")
        lines.append("")
    return "\n".join(lines) + "\n"
