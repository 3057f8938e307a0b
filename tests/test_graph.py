from __future__ import annotations

import networkx as nx

from stagewatch.graph import PipelineGraph, _reach_counts
from stagewatch.spec import Pipeline, Stage


def _stage(sid, *upstream):
    return Stage(id=sid, kind="learned", modality="tabular", output="score", serving="online",
                 volume_per_hour=100, change_rate="days", upstream=list(upstream))


def test_order_edges_and_reach_on_a_fan_in():
    pipeline = Pipeline("p", [_stage("d", "b", "c"), _stage("a"), _stage("b", "a"), _stage("c", "a")])
    g = PipelineGraph.build(pipeline)
    assert g.order.index("a") < g.order.index("b") < g.order.index("d")
    assert set(g.edges) == {("a", "b"), ("a", "c"), ("b", "d"), ("c", "d")}
    assert g.reach == {"a": 3, "b": 1, "c": 1, "d": 0}
    assert g.sources == ["a"] and g.sinks == ["d"]


def test_reach_counts_agree_with_networkx_descendants():
    graph = nx.gnp_random_graph(60, 0.08, seed=7, directed=True)
    dag = nx.DiGraph((u, v) for u, v in graph.edges if u < v)
    dag.add_nodes_from(range(60))
    order = list(nx.topological_sort(dag))
    children = {n: list(dag.successors(n)) for n in dag}
    assert _reach_counts(children, order) == {n: len(nx.descendants(dag, n)) for n in dag}


def test_order_and_neighbours_agree_with_networkx():
    """The graph is built without networkx; its order is networkx's lexicographical topological sort (by the
    stages' place in the description) and its neighbours are networkx's, on random DAGs listed shuffled."""
    import random

    for seed in range(5):
        rng = random.Random(seed)
        dag = nx.DiGraph((u, v) for u, v in nx.gnp_random_graph(50, 0.1, seed=seed, directed=True).edges if u < v)
        dag.add_nodes_from(range(50))
        listed = list(dag)
        rng.shuffle(listed)
        pipeline = Pipeline("p", [_stage(f"s{n}", *(f"s{u}" for u in dag.predecessors(n))) for n in listed])
        g = PipelineGraph.build(pipeline)
        place = {f"s{n}": i for i, n in enumerate(listed)}
        named = nx.relabel_nodes(dag, {n: f"s{n}" for n in dag})
        assert g.order == list(nx.lexicographical_topological_sort(named, key=place.__getitem__))
        assert all(set(g.upstream(n)) == set(named.predecessors(n)) for n in named)
        assert all(set(g.downstream(n)) == set(named.successors(n)) for n in named)
        assert g.sources == [n for n in g.order if named.in_degree(n) == 0]
