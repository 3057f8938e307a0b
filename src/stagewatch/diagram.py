"""The pipeline diagram's content: what each stage box and each hand-off label says, placed by :mod:`layout`.

The SVG itself is written by ``templates/html/diagram.svg.j2`` (autoescaped); this module only decides the words,
the marks and where they go, so the drawing can be checked without a browser.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import networkx as nx

from stagewatch import fold
from stagewatch.graph import plan_graph
from stagewatch.layout import Layout, Rect, layered

BOX = (216.0, 76.0)
MARKED_BOX = (216.0, 106.0)  # two more lines: the verdict, and the likely origin or consequence
CHAR = 6.8  # width of one character of the 11px monospace labels (0.6 em, plus room for wider fallback fonts)
LINE = 14.0
LABEL_CHARS = 30  # longest label line; longer text is cut with an ellipsis (the full text is in its tooltip)
ID_CHARS = 27  # longest stage id shown in a box
STATISTIC_NAMES = {
    "psi": "PSI", "chi_square": "mix", "ks": "KS", "proportion": "share", "quantile": "quantile",
    "mean": "mean", "count": "count", "level": "limit", "burn_rate": "burn rate",
}
LIVE = ("proposed", "accepted")


@dataclass
class StageBox:
    id: str
    shown_id: str
    kind: str
    counts: dict[str, int]
    pages: int
    tickets: int
    rect: Rect
    mark: dict[str, Any] | None = None  # {"verdict": css name, "word": text}
    origin: bool = False
    consequence: bool = False


@dataclass
class HandOff:
    source: str
    target: str
    lines: list[str]
    full: str
    points: list[tuple[float, float]]
    label: Rect
    mark: str = ""


@dataclass
class Diagram:
    width: float
    height: float
    stages: list[StageBox]
    edges: list[HandOff]
    layers: int = 0


def _cut(text: str, limit: int) -> str:
    return text if len(text) <= limit else text[: limit - 1] + "…"


def kind_words(stage: dict[str, Any]) -> str:
    if stage.get("kind") == "source":
        return f"source, {stage.get('modality', '')}"
    return f"{stage.get('kind', '')}, {stage.get('output', '')}"


def _live(metrics: list[dict[str, Any]]) -> list[dict[str, Any]]:
    return [m for m in metrics if m.get("status", "proposed") in LIVE]


def handoff_sides(plan: dict[str, Any]) -> dict[tuple[str, str], dict[str, list[dict[str, Any]]]]:
    """For each edge: the producer's checks of what it sends and the consumer's checks of what it receives."""
    out: dict[tuple[str, str], dict[str, list[dict[str, Any]]]] = {}
    for stage in plan["stages"]:
        for up in stage.get("upstream", []) or []:
            out[(up, stage["id"])] = {"upstream": [], "downstream": []}
    for stage in plan["stages"]:
        for m in _live(stage.get("metrics", [])):
            for edge in fold.handoff_sides(m):  # born on the hand-off, or folded into a stage's own check
                key = (edge.get("from"), edge.get("to"))
                if key in out and edge.get("side") in ("upstream", "downstream"):
                    out[key][edge["side"]].append(m)  # type: ignore[index]
    return out


def _side_words(metrics: list[dict[str, Any]]) -> str:
    names = []
    for m in metrics:
        name = STATISTIC_NAMES.get(m["statistic"], m["statistic"])
        if name not in names:
            names.append(name)
    return ", ".join(names) or "nothing"


def build(plan: dict[str, Any], marks: dict[str, dict[str, Any]] | None = None,
          origins: set[str] | None = None, consequences: set[str] | None = None,
          edge_marks: dict[tuple[str, str], str] | None = None) -> Diagram:
    """The diagram of ``plan``; ``marks`` per stage id ({"verdict", "word"}), the likely origin stages and their
    consequences, and marks on hand-offs (an origin placed on a hand-off)."""
    g: nx.DiGraph = plan_graph(plan)
    position = {s["id"]: i for i, s in enumerate(plan["stages"])}
    order = list(nx.lexicographical_topological_sort(g, key=lambda n: position[n]))
    edges = sorted(g.edges, key=lambda e: (order.index(e[1]), order.index(e[0])))
    sides = handoff_sides(plan)
    texts: dict[tuple[str, str], list[str]] = {}
    sizes: dict[tuple[str, str], tuple[float, float]] = {}
    for e in edges:
        side = sides.get(e, {"upstream": [], "downstream": []})
        lines = ["sent: " + _side_words(side["upstream"]), "received: " + _side_words(side["downstream"])]
        texts[e] = lines
        shown = [_cut(x, LABEL_CHARS) for x in lines]
        sizes[e] = (max(len(x) for x in shown) * CHAR + 12, LINE * len(shown) + 8)
    lay: Layout = layered(order, edges, MARKED_BOX if marks is not None else BOX, sizes)
    by_id = {s["id"]: s for s in plan["stages"]}
    stages = []
    for sid in order:
        stage = by_id[sid]
        live = _live(stage.get("metrics", []))
        stages.append(StageBox(
            id=sid, shown_id=_cut(sid, ID_CHARS), kind=kind_words(stage),
            counts={layer: sum(1 for m in live if m.get("layer") == layer) for layer in ("software", "input", "output")},
            pages=sum(1 for m in live if m.get("severity") == "page"),
            tickets=sum(1 for m in live if m.get("severity") != "page"),
            rect=lay.boxes[sid], mark=(marks or {}).get(sid), origin=sid in (origins or set()),
            consequence=sid in (consequences or set())))
    hand_offs = [HandOff(source=r.source, target=r.target, lines=[_cut(x, LABEL_CHARS) for x in texts[(r.source, r.target)]],
                         full=f"{r.source} → {r.target}: " + "; ".join(texts[(r.source, r.target)]),
                         points=r.points, label=r.label, mark=(edge_marks or {}).get((r.source, r.target), ""))
                 for r in lay.edges]
    return Diagram(width=lay.width, height=lay.height, stages=stages, edges=hand_offs,
                   layers=max(lay.layer_of.values(), default=0) + 1)
