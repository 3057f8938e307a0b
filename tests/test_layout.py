"""The diagram's layout: layers from the topological order, and nothing drawn over a stage box, for generated
pipelines of 1 to 40 stages (networkx gives the longest paths the layers must match)."""

from __future__ import annotations

import itertools

import networkx as nx
from hypothesis import given, settings
from hypothesis import strategies as st

from stagewatch.layout import Rect, layered

BOX = (216.0, 76.0)


@st.composite
def pipelines(draw):
    n = draw(st.integers(1, 40))
    names = [f"s{i}" for i in range(n)]
    pairs = [(i, j) for i in range(n) for j in range(i + 1, min(n, i + 8))]  # hand-offs reach a few stages on
    chosen = draw(st.lists(st.sampled_from(pairs), unique=True, max_size=2 * n)) if pairs else []
    edges = [(names[i], names[j]) for i, j in chosen]
    labels = {e: (draw(st.floats(40, 260)), draw(st.floats(14, 44))) for e in edges}
    return names, edges, labels


def _inside(x: float, y: float, r: Rect, margin: float = 0.5) -> bool:
    return r.x + margin < x < r.x + r.w - margin and r.y + margin < y < r.y + r.h - margin


@settings(max_examples=150, deadline=None, derandomize=True)
@given(pipelines())
def test_no_box_overlaps_and_nothing_covers_a_box(pipeline):
    names, edges, labels = pipeline
    graph = nx.DiGraph(edges)
    graph.add_nodes_from(names)
    order = list(nx.topological_sort(graph))
    lay = layered(order, edges, BOX, labels)
    assert set(lay.boxes) == set(names)
    boxes = list(lay.boxes.values())
    for a, b in itertools.combinations(boxes, 2):
        assert not a.overlaps(b), (a, b)
    routes = {(r.source, r.target): r for r in lay.edges}
    assert set(routes) == set(edges)
    for r in lay.edges:
        assert (r.label.w, r.label.h) == labels[(r.source, r.target)]
        for box in boxes:
            assert not r.label.overlaps(box), (r, box)
        # every segment stays off every box but at its own two ends
        for (x1, y1), (x2, y2) in zip(r.points, r.points[1:]):
            for t in (0.1, 0.3, 0.5, 0.7, 0.9):
                x, y = x1 + t * (x2 - x1), y1 + t * (y2 - y1)
                for name, box in lay.boxes.items():
                    assert not _inside(x, y, box), (r.source, r.target, name)
        assert r.points[0][1] == lay.boxes[r.source].y + lay.boxes[r.source].h
        assert r.points[-1][1] == lay.boxes[r.target].y
    for a, b in itertools.combinations(lay.edges, 2):
        assert not a.label.overlaps(b.label)
    for rect in boxes + [r.label for r in lay.edges]:
        assert 0 <= rect.x and rect.x + rect.w <= lay.width and 0 <= rect.y and rect.y + rect.h <= lay.height
    # a stage's layer is the longest path that ends at it (networkx), and data flows down the page
    for v in names:
        above = graph.subgraph(nx.ancestors(graph, v) | {v})
        assert lay.layer_of[v] == nx.dag_longest_path_length(above)
    for u, v in edges:
        assert lay.boxes[v].y > lay.boxes[u].y + lay.boxes[u].h


def test_one_stage_alone_and_a_fan_in():
    lay = layered(["a"], [], BOX, {})
    assert list(lay.boxes) == ["a"] and not lay.edges and lay.width > BOX[0]
    order = ["a", "b", "c", "d"]
    edges = [("a", "d"), ("b", "d"), ("c", "d")]
    lay = layered(order, edges, BOX, {})
    ends = sorted(r.points[-1][0] for r in lay.edges)
    assert len(set(ends)) == 3  # three arrows into d arrive at three points along its top
