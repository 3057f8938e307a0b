"""Render a plan to Markdown for code review (summary, Mermaid diagram, per-stage metrics, cascade, open decisions).

Everything a person wrote (descriptions, notes, names) is escaped for the place it lands: Markdown table cells,
Mermaid labels. Templates live in ``templates/``.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import jinja2

from stagewatch import yamlio
from stagewatch.plan import all_metrics
from stagewatch.resources import data_dir

LAYERS = ("software", "input", "output")
STATISTIC_NAMES = {
    "psi": "PSI", "chi_square": "chi-square (w)", "ks": "KS", "proportion": "share", "quantile": "quantile share",
    "mean": "mean shift", "count": "count", "level": "fixed limit", "burn_rate": "SLO burn rate",
}


def md_cell(value: Any) -> str:
    """Text safe inside one Markdown table cell: no pipes, no line breaks, no raw HTML."""
    text = "" if value is None else str(value)
    text = text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    text = text.replace("|", "\\|").replace("`", "&#96;")
    return re.sub(r"\s+", " ", text).strip()


def md_text(value: Any) -> str:
    """Free text in a paragraph: raw HTML neutralised, lines joined."""
    text = "" if value is None else str(value)
    text = text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    return re.sub(r"\s+", " ", text).strip()


def mermaid_id(value: str) -> str:
    return "s_" + re.sub(r"[^A-Za-z0-9_]", "_", value)


def mermaid_label(value: Any) -> str:
    """A label for use inside ``["..."]``: quotes and brackets become Mermaid entity codes."""
    text = re.sub(r"\s+", " ", "" if value is None else str(value)).strip()
    for raw, code in (("#", "#35;"), ('"', "#quot;"), ("<", "#lt;"), (">", "#gt;"), ("[", "#91;"), ("]", "#93;"),
                      ("{", "#123;"), ("}", "#125;"), ("|", "#124;"), ("`", "#96;")):
        text = text.replace(raw, code)
    return text


def threshold(value: Any) -> str:
    if value is None:
        return "–"
    return f"{value:g}" if isinstance(value, (int, float)) else str(value)


def environment() -> jinja2.Environment:
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(data_dir("templates"))),
                             keep_trailing_newline=True,
                             trim_blocks=True, lstrip_blocks=True, autoescape=False)
    from stagewatch.propose import small

    env.filters.update(small=small, cell=md_cell, text=md_text, mid=mermaid_id, mlabel=mermaid_label, th=threshold,
                       stat=lambda s: STATISTIC_NAMES.get(s, s))
    return env


def _edges(plan: dict[str, Any]) -> list[dict[str, Any]]:
    by_id = {s["id"]: s for s in plan["stages"]}
    out = []
    for stage in plan["stages"]:
        for up in stage.get("upstream", []):
            def side(owner: str, name: str) -> list[dict[str, Any]]:
                return [m for m in by_id[owner]["metrics"] if (m.get("edge") or {}).get("from") == up
                        and m["edge"]["to"] == stage["id"] and m["edge"]["side"] == name]
            out.append({"from": up, "to": stage["id"], "upstream": side(up, "upstream"),
                        "downstream": side(stage["id"], "downstream")})
    return out


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
        "open": [m for m in metrics if m["status"] == "proposed"],
        "flagged": [m for m in metrics if m.get("review")],
    }


def render_markdown(plan: dict[str, Any]) -> str:
    return environment().get_template("plan.md.j2").render(**context(plan))


def render(plan: dict[str, Any], out_dir: str | Path) -> list[Path]:
    """Write the review documents for ``plan`` into ``out_dir``; returns the files written."""
    target = Path(out_dir) / "plan.md"
    yamlio.write_atomic(target, render_markdown(plan))
    return [target]
