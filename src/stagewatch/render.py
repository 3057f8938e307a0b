"""Render a plan to Markdown for code review (summary, Mermaid diagram, per-stage metrics, cascade, open decisions).

Everything a person wrote (descriptions, notes, names) goes through the helper of :mod:`stagewatch.escape` for the
place it lands: Markdown text and table cells, code spans, Mermaid labels. Templates live in ``templates/``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Sequence

import jinja2

from stagewatch import fold
from stagewatch.escape import markdown_cell, markdown_code, markdown_text, mermaid_label
from stagewatch.names import mermaid_id
from stagewatch.plan import all_metrics
from stagewatch.resources import data_dir
from stagewatch.owned import write_owned
from stagewatch.safewrite import STDOUT, safe_write

LAYERS = ("software", "input", "output")
STATISTIC_NAMES = {
    "psi": "PSI", "chi_square": "chi-square (w)", "ks": "KS", "proportion": "share", "quantile": "quantile share",
    "mean": "mean shift", "count": "count", "level": "fixed limit", "burn_rate": "SLO burn rate",
}


md_cell = markdown_cell  # the names the templates and older callers use
md_text = markdown_text


def threshold(value: Any) -> str:
    if value is None:
        return "–"
    return f"{value:g}" if isinstance(value, (int, float)) else str(value)


def environment() -> jinja2.Environment:
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(data_dir("templates"))),
                             keep_trailing_newline=True,
                             trim_blocks=True, lstrip_blocks=True, autoescape=False)
    from stagewatch.propose import small

    env.filters.update(small=small, cell=markdown_cell, text=markdown_text, code=markdown_code, mid=mermaid_id,
                       mlabel=mermaid_label, th=threshold,
                       stat=lambda s: STATISTIC_NAMES.get(s, s))
    return env


def _edges(plan: dict[str, Any]) -> list[dict[str, Any]]:
    by_id = {s["id"]: s for s in plan["stages"]}
    out = []
    for stage in plan["stages"]:
        for up in stage.get("upstream", []):
            def side(owner: str, name: str) -> list[dict[str, Any]]:
                return fold.on_handoff(by_id[owner]["metrics"], up, stage["id"], name)
            out.append({"from": up, "to": stage["id"], "upstream": side(up, "upstream"),
                        "downstream": side(stage["id"], "downstream")})
    return out


def watch_first(plan: dict[str, Any], top: int = 3) -> list[dict[str, Any]]:
    """The stages with the most stages downstream: the first ``top``, and every stage tied with the last of them."""
    ordered = sorted(plan["stages"], key=lambda s: (-s.get("downstream_reach", 0), s["id"]))
    if not ordered:
        return []
    cutoff = ordered[min(top, len(ordered)) - 1].get("downstream_reach", 0)
    return [s for s in ordered if s.get("downstream_reach", 0) >= cutoff]


def context(plan: dict[str, Any]) -> dict[str, Any]:
    metrics = all_metrics(plan)
    status_counts = {s: sum(1 for m in metrics if m["status"] == s) for s in ("proposed", "accepted", "rejected",
                                                                             "stale")}
    return {
        "plan": plan,
        "layers": LAYERS,
        "metrics": metrics,
        "status_counts": status_counts,
        "edges": _edges(plan),
        "watch_first": sorted(plan["stages"], key=lambda s: (-s.get("downstream_reach", 0), s["id"])),
        "watch_top": watch_first(plan),
        "open": [m for m in metrics if m["status"] == "proposed"],
        "flagged": [m for m in metrics if m.get("review")],
    }


def render_markdown(plan: dict[str, Any]) -> str:
    return environment().get_template("plan.md.j2").render(**context(plan))


def render(plan: dict[str, Any], out_dir: str | Path, inputs: Sequence[str | Path] = (),
           force: bool = False) -> list[Path]:
    """Write the review documents for ``plan`` into ``out_dir`` (``-``: standard output); returns the files
    written. A file among ``inputs`` (the plan read) is never written over, nor one edited by hand (see
    ``owned.py``) unless ``force``."""
    if str(out_dir) == STDOUT:
        safe_write(STDOUT, render_markdown(plan))
        return []
    target = Path(out_dir) / "plan.md"
    write_owned(out_dir, {target: render_markdown(plan)}, kind="render-markdown", inputs=inputs, force=force)
    return [target]
