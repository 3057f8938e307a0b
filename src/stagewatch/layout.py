"""Where each stage box and hand-off label of the pipeline diagram goes: a layered drawing, top to bottom.

Layers come from the topological order (a stage sits one layer below its lowest upstream stage). Between two layers
of boxes lies a band of hand-off labels: every edge gets its label in the band just above its target, and an edge
that skips layers passes each band in between through a slot of its own. Every band is packed left to right with a
gap between neighbours, and bands occupy disjoint heights, so by construction no two boxes overlap, no label covers a
box or another label, and every segment of an edge runs between two neighbouring bands, never across a box.

>>> lay = layered(["a", "b", "c"], [("a", "b"), ("b", "c"), ("a", "c")], (100, 40), {})
>>> [lay.layer_of[s] for s in "abc"]
[0, 1, 2]
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

GAP_X = 28.0  # between neighbours in a band
GAP_Y = 26.0  # between bands
PASS_WIDTH = 8.0  # the slot an edge takes where it passes a band
MARGIN = 12.0


@dataclass(frozen=True)
class Rect:
    x: float
    y: float
    w: float
    h: float

    @property
    def cx(self) -> float:
        return self.x + self.w / 2

    def overlaps(self, other: "Rect") -> bool:
        return (self.x < other.x + other.w and other.x < self.x + self.w
                and self.y < other.y + other.h and other.y < self.y + self.h)


@dataclass
class EdgeRoute:
    source: str
    target: str
    points: list[tuple[float, float]]  # from the source box's bottom to the target box's top
    label: Rect


@dataclass
class Layout:
    width: float
    height: float
    boxes: dict[str, Rect]
    edges: list[EdgeRoute]
    layer_of: dict[str, int] = field(default_factory=dict)


@dataclass
class _Item:
    key: tuple
    w: float
    h: float
    x: float = 0.0


def layers_of(order: Sequence[str], edges: Sequence[tuple[str, str]]) -> dict[str, int]:
    """Longest-path layering: sources on layer 0, every stage one below its lowest upstream stage."""
    position = {n: i for i, n in enumerate(order)}
    layer = {n: 0 for n in order}
    for u, v in sorted(edges, key=lambda e: position[e[1]]):
        layer[v] = max(layer[v], layer[u] + 1)
    return layer


def layered(order: Sequence[str], edges: Sequence[tuple[str, str]], box: tuple[float, float],
            labels: Mapping[tuple[str, str], tuple[float, float]], default_label: tuple[float, float] = (60, 16)
            ) -> Layout:
    """Place boxes of size ``box`` in layers and each edge's label (``labels[(u, v)]``: width, height).

    ``order`` is a topological order of the stages; edges must point forward in it.
    """
    layer = layers_of(order, edges)
    depth = max(layer.values(), default=0) + 1
    # bands: 2k holds the boxes of layer k, 2k - 1 the labels (and passing slots) just above layer k
    bands: list[list[_Item]] = [[] for _ in range(2 * depth - 1)]
    for n in order:
        bands[2 * layer[n]].append(_Item(("box", n), *box))
    chains: dict[tuple[str, str], list[tuple[int, _Item]]] = {}
    for u, v in edges:
        chain = []
        for b in range(2 * layer[u] + 1, 2 * layer[v]):
            if b == 2 * layer[v] - 1:
                item = _Item(("label", u, v), *labels.get((u, v), default_label))
            else:
                item = _Item(("pass", u, v, b), PASS_WIDTH, 0.0)
            bands[b].append(item)
            chain.append((b, item))
        chains[(u, v)] = chain
    _order_bands(bands, edges, chains)
    _place(bands, edges, chains)
    heights = [max((i.h for i in band), default=0.0) for band in bands]
    tops, y = [], MARGIN
    for h in heights:
        tops.append(y)
        y += h + GAP_Y
    left = min((i.x for band in bands for i in band), default=0.0)
    shift = MARGIN - left
    boxes: dict[str, Rect] = {}
    for b in range(0, len(bands), 2):
        for item in bands[b]:
            if item.key[0] == "box":
                boxes[item.key[1]] = Rect(item.x + shift, tops[b], item.w, item.h)
    routes = []
    for u, v in edges:
        points = [(boxes[u].cx, boxes[u].y + boxes[u].h)]
        label = None
        for b, item in chains[(u, v)]:
            x = item.x + shift + item.w / 2
            if item.key[0] == "label":
                top = tops[b] + (heights[b] - item.h) / 2
                label = Rect(item.x + shift, top, item.w, item.h)
                points += [(x, top), (x, top + item.h)]
            else:
                points += [(x, tops[b]), (x, tops[b] + heights[b])]
        points.append((boxes[v].cx, boxes[v].y))
        assert label is not None  # every edge goes down at least one layer, so it crosses one label band
        routes.append(EdgeRoute(u, v, points, label))
    _spread_ports(routes, boxes)
    width = max((i.x + shift + i.w for band in bands for i in band), default=0.0) + MARGIN
    return Layout(width=width, height=y - GAP_Y + MARGIN, boxes=boxes, edges=routes, layer_of=layer)


def _spread_ports(routes: list[EdgeRoute], boxes: dict[str, Rect]) -> None:
    """Edges that leave or enter one box do so at points spread along its edge, in the order of their other end,
    so arrows into a stage that many feed stay apart."""
    leaving: dict[str, list[EdgeRoute]] = {}
    entering: dict[str, list[EdgeRoute]] = {}
    for r in routes:
        leaving.setdefault(r.source, []).append(r)
        entering.setdefault(r.target, []).append(r)
    for name, group in leaving.items():
        box = boxes[name]
        for i, r in enumerate(sorted(group, key=lambda r: r.points[1][0])):
            r.points[0] = (box.x + box.w * (i + 1) / (len(group) + 1), r.points[0][1])
    for name, group in entering.items():
        box = boxes[name]
        for i, r in enumerate(sorted(group, key=lambda r: r.points[-2][0])):
            r.points[-1] = (box.x + box.w * (i + 1) / (len(group) + 1), r.points[-1][1])


def _neighbours(bands: list[list[_Item]], edges: Sequence[tuple[str, str]],
                chains: dict[tuple[str, str], list[tuple[int, _Item]]]) -> dict[int, tuple[list, list]]:
    """For each item (by id): the items just above and just below it along the edges."""
    where: dict[tuple, _Item] = {i.key: i for band in bands for i in band}
    up: dict[int, list[_Item]] = {}
    down: dict[int, list[_Item]] = {}
    for u, v in edges:
        path = [where[("box", u)]] + [i for _, i in chains[(u, v)]] + [where[("box", v)]]
        for a, b in zip(path, path[1:]):
            down.setdefault(id(a), []).append(b)
            up.setdefault(id(b), []).append(a)
    return {k: (up.get(k, []), down.get(k, [])) for k in {id(i) for band in bands for i in band}}


def _order_bands(bands: list[list[_Item]], edges: Sequence[tuple[str, str]],
                 chains: dict[tuple[str, str], list[tuple[int, _Item]]]) -> None:
    """Fewer crossings: a few sweeps of the barycentre heuristic (each item at the mean rank of its neighbours)."""
    links = _neighbours(bands, edges, chains)
    rank = {id(i): r for band in bands for r, i in enumerate(band)}
    for sweep in range(4):
        down = sweep % 2 == 0
        sequence = range(1, len(bands)) if down else range(len(bands) - 2, -1, -1)
        for b in sequence:
            def centre(item: _Item) -> float:
                near = links[id(item)][0 if down else 1]
                return sum(rank[id(n)] for n in near) / len(near) if near else rank[id(item)]

            bands[b].sort(key=lambda i: (centre(i), rank[id(i)]))
            for r, i in enumerate(bands[b]):
                rank[id(i)] = r


def _place(bands: list[list[_Item]], edges: Sequence[tuple[str, str]],
           chains: dict[tuple[str, str], list[tuple[int, _Item]]]) -> None:
    """x positions: each item near the mean centre of its neighbours, in band order, never closer than GAP_X."""
    links = _neighbours(bands, edges, chains)
    for band in bands:
        x = 0.0
        for item in band:
            item.x = x
            x += item.w + GAP_X
    for sweep in range(4):
        down = sweep % 2 == 0
        sequence = range(1, len(bands)) if down else range(len(bands) - 2, -1, -1)
        for b in sequence:
            band = bands[b]
            wanted = []
            for item in band:
                near = links[id(item)][0 if down else 1]
                centre = sum(n.x + n.w / 2 for n in near) / len(near) if near else item.x + item.w / 2
                wanted.append(centre - item.w / 2)
            _pack(band, wanted)


def _pack(band: list[_Item], wanted: list[float]) -> None:
    """Put items as close to their wanted x as the order and the gap allow: push right where two would come too
    close, then shift the whole band by the mean displacement, so it does not drift to one side."""
    x = -float("inf")
    for item, want in zip(band, wanted):
        item.x = max(want, x)
        x = item.x + item.w + GAP_X
    if band:
        offset = sum(i.x - w for i, w in zip(band, wanted)) / len(band)
        for item in band:
            item.x -= offset
