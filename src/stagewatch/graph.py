"""The pipeline as a directed graph: checks, order, downstream reach and hand-offs.

Errors name the culprits: duplicate ids, upstream ids that name no stage, and every stage on a cycle.
"""

from __future__ import annotations

from dataclasses import dataclass

import networkx as nx

from stagewatch.errors import StagewatchError
from stagewatch.names import first_collision
from stagewatch.spec import Pipeline
from stagewatch.yamlio import Document


@dataclass
class PipelineGraph:
    graph: nx.DiGraph
    order: list[str]
    edges: list[tuple[str, str]]
    reach: dict[str, int]

    @classmethod
    def build(cls, pipeline: Pipeline, doc: Document | None = None) -> "PipelineGraph":
        path = doc.path if doc else pipeline.source_path

        def line(*keys: object) -> int | None:
            return doc.line_of(keys) if doc else None

        seen: dict[str, int] = {}
        for index, stage in enumerate(pipeline.stages):
            if stage.id in seen:
                raise StagewatchError(
                    f"stage id '{stage.id}' is used twice (stages {seen[stage.id] + 1} and {index + 1})",
                    file=path, line=line("stages", index, "id"), expected="a unique id per stage")
            seen[stage.id] = index
        clash = first_collision((s.id, i) for i, s in enumerate(pipeline.stages))
        if clash:
            (one, i), (other, j), output, form = clash
            raise StagewatchError(
                f"stage ids '{one}' (line {line('stages', i, 'id')}) and '{other}' (line "
                f"{line('stages', j, 'id')}) both become '{form}' in {output}", file=path,
                line=line("stages", j, "id"), expected="stage ids that differ in more than _ and -")
        graph = nx.DiGraph()
        graph.add_nodes_from(s.id for s in pipeline.stages)
        for index, stage in enumerate(pipeline.stages):
            for u_index, up in enumerate(stage.upstream):
                if up not in seen:
                    known = ", ".join(sorted(seen))
                    raise StagewatchError(f"stage '{stage.id}' names upstream '{up}', which is not a stage",
                                          file=path, line=line("stages", index, "upstream", u_index),
                                          expected=f"one of {known}")
                if up == stage.id:
                    raise StagewatchError(f"stage '{stage.id}' lists itself as its own upstream",
                                          file=path, line=line("stages", index, "upstream", u_index),
                                          expected="ids of other stages")
                graph.add_edge(up, stage.id)
        try:
            order = list(nx.lexicographical_topological_sort(graph, key=lambda n: seen[n]))
        except nx.NetworkXUnfeasible:
            cycle = nx.find_cycle(graph)
            names = [u for u, _ in cycle] + [cycle[0][0]]
            first = min(seen[n] for n, _ in cycle)
            raise StagewatchError("the stages form a cycle: " + " -> ".join(names), file=path,
                                  line=line("stages", first, "upstream"),
                                  expected="upstream links that never lead back to the same stage") from None
        position = {n: i for i, n in enumerate(order)}
        edges = sorted(graph.edges, key=lambda e: (position[e[1]], position[e[0]]))
        return cls(graph=graph, order=order, edges=edges, reach=_reach_counts(graph, order))

    def upstream(self, stage_id: str) -> list[str]:
        return [u for u, v in self.edges if v == stage_id]

    def downstream(self, stage_id: str) -> list[str]:
        return [v for u, v in self.edges if u == stage_id]

    @property
    def sources(self) -> list[str]:
        return [n for n in self.order if self.graph.in_degree(n) == 0]

    @property
    def sinks(self) -> list[str]:
        return [n for n in self.order if self.graph.out_degree(n) == 0]


def _reach_counts(graph: nx.DiGraph, order: list[str]) -> dict[str, int]:
    """Number of stages downstream of each stage.

    Bit sets over the reverse topological order: O((V + E) * V / 64) word operations, which stays close to linear
    for the pipeline sizes people write, where ``len(nx.descendants(...))`` per stage would be quadratic.
    """
    bit = {n: 1 << i for i, n in enumerate(order)}
    below: dict[str, int] = {}
    for node in reversed(order):
        mask = 0
        for child in graph.successors(node):
            mask |= bit[child] | below[child]
        below[node] = mask
    return {n: below[n].bit_count() for n in order}


def plan_graph(plan: dict) -> nx.DiGraph:
    """The stages of a loaded plan (or description) and their upstream edges, for commands that read a plan."""
    graph = nx.DiGraph()
    graph.add_nodes_from(s["id"] for s in plan["stages"])
    graph.add_edges_from((u, s["id"]) for s in plan["stages"] for u in s.get("upstream", []) or [])
    return graph
