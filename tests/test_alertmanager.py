"""Inhibition along the graph without a rule per pair of stages: the lineage label and each stage's pattern must
select exactly the stages networkx finds below it, on chains, trees, diamonds and random layered graphs.
Patterns are matched whole, as Alertmanager (Go's RE2) does; they use only syntax both engines read alike."""

from __future__ import annotations

import random
import re

import networkx as nx
import pytest

from stagewatch.exporters.alertmanager import Lineage, alertmanager_config, at_least


def _plan(edges: dict[str, list[str]]) -> dict:
    return {"pipeline": "p", "stages": [{"id": s, "upstream": up, "metrics": []} for s, up in edges.items()]}


def _random(n: int, seed: int) -> dict[str, list[str]]:
    rng = random.Random(seed)
    out: dict[str, list[str]] = {}
    for i in range(n):
        earlier = list(out)[max(0, i - 12):]
        out[f"s{i}"] = sorted(rng.sample(earlier, min(len(earlier), rng.choice([0, 1, 1, 2, 3])))) if i else []
    return out


GRAPHS = {
    "chain": {f"c{i}": [f"c{i - 1}"] if i else [] for i in range(120)},
    "diamond": {"a": [], "b": ["a"], "c": ["a"], "d": ["b", "c"], "e": ["d"], "f": []},
    "tree": {f"t{i}": [f"t{(i - 1) // 3}"] if i else [] for i in range(60)},
    **{f"random-{seed}": _random(150, seed) for seed in range(4)},
}


@pytest.mark.parametrize("name", GRAPHS)
def test_each_stage_pattern_matches_exactly_the_stages_below_it(name):
    edges = GRAPHS[name]
    graph = nx.DiGraph()
    graph.add_nodes_from(edges)
    graph.add_edges_from((u, s) for s, ups in edges.items() for u in ups)
    lineage = Lineage.of(_plan(edges))
    for stage in edges:
        text = lineage.below_pattern(stage)
        pattern = re.compile(text if text is not None else "(?!)")  # None: nothing below, matches nothing
        matched = {s for s in edges if (label := lineage.label(s)) is not None and pattern.fullmatch(label)}
        assert matched == nx.descendants(graph, stage), stage


def test_at_least_matches_the_numbers_from_its_bound():
    for bound in (0, 1, 7, 9, 10, 27, 99, 100, 109, 990, 1234):
        pattern = re.compile(at_least(bound))
        assert [n for n in range(0, 3000) if pattern.fullmatch(str(n))] == list(range(bound, 3000)), bound


def test_the_configuration_grows_linearly_along_a_chain():
    def size(n: int) -> int:
        return len(repr(alertmanager_config(_plan({f"c{i}": [f"c{i - 1}"] if i else [] for i in range(n)}), [])))

    assert size(2000) <= 2.2 * size(1000)
