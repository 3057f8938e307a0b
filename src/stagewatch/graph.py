"""The pipeline as a directed graph: checks, order, downstream reach and hand-offs.

Errors name the culprits: duplicate ids, upstream ids that name no stage, and every stage on a cycle.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass
from typing import TYPE_CHECKING

from stagewatch.errors import StagewatchError
from stagewatch.names import first_collision
from stagewatch.spec import Pipeline
from stagewatch.yamlio import Document

if TYPE_CHECKING:
    import networkx as nx


@dataclass
class PipelineGraph:
    """The checked graph of a description, in plain lists (no networkx: every command that reads a plan builds
    it, and importing networkx would cost more than building it)."""

    order: list[str]
    edges: list[tuple[str, str]]
    reach: dict[str, int]
    parents: dict[str, list[str]]  # per stage, its upstream stages in topological order
    children: dict[str, list[str]]  # per stage, its downstream stages in topological order

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
        children: dict[str, list[str]] = {s.id: [] for s in pipeline.stages}
        indegree = dict.fromkeys(children, 0)
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
                if stage.id not in children[up]:  # an upstream named twice is one edge
                    children[up].append(stage.id)
                    indegree[stage.id] += 1
        order = _ordered(children, indegree, seen)
        if len(order) < len(children):
            import networkx as nx  # only to name the stages of the cycle

            graph = nx.DiGraph()
            graph.add_nodes_from(children)
            graph.add_edges_from((u, v) for u, vs in children.items() for v in vs)
            cycle = nx.find_cycle(graph)
            names = [u for u, _ in cycle] + [cycle[0][0]]
            first = min(seen[n] for n, _ in cycle)
            raise StagewatchError("the stages form a cycle: " + " -> ".join(names), file=path,
                                  line=line("stages", first, "upstream"),
                                  expected="upstream links that never lead back to the same stage") from None
        position = {n: i for i, n in enumerate(order)}
        edges = sorted(((u, v) for u, vs in children.items() for v in vs),
                       key=lambda e: (position[e[1]], position[e[0]]))
        parents: dict[str, list[str]] = {n: [] for n in order}
        below: dict[str, list[str]] = {n: [] for n in order}
        for u, v in edges:  # in edge order, so both lists follow the topological order
            parents[v].append(u)
            below[u].append(v)
        return cls(order=order, edges=edges, reach=_reach_counts(children, order), parents=parents,
                   children=below)

    def upstream(self, stage_id: str) -> list[str]:
        return list(self.parents[stage_id])

    def downstream(self, stage_id: str) -> list[str]:
        return list(self.children[stage_id])

    @property
    def sources(self) -> list[str]:
        return [n for n in self.order if not self.parents[n]]

    @property
    def sinks(self) -> list[str]:
        return [n for n in self.order if not self.children[n]]


def _ordered(children: dict[str, list[str]], indegree: dict[str, int], key: dict[str, int]) -> list[str]:
    """Topological order, taking among the stages ready the one first in the description (the order
    networkx's ``lexicographical_topological_sort`` gives); shorter than the stages when there is a cycle."""
    left = dict(indegree)
    ready = [(key[n], n) for n, d in left.items() if d == 0]
    heapq.heapify(ready)
    order = []
    while ready:
        _, node = heapq.heappop(ready)
        order.append(node)
        for child in children[node]:
            left[child] -= 1
            if left[child] == 0:
                heapq.heappush(ready, (key[child], child))
    return order


def _reach_counts(children: dict[str, list[str]], order: list[str]) -> dict[str, int]:
    """Number of stages downstream of each stage.

    Bit sets over the reverse topological order: O((V + E) * V / 64) word operations, which stays close to linear
    for the pipeline sizes people write, where ``len(nx.descendants(...))`` per stage would be quadratic.
    """
    bit = {n: 1 << i for i, n in enumerate(order)}
    below: dict[str, int] = {}
    for node in reversed(order):
        mask = 0
        for child in children[node]:
            mask |= bit[child] | below[child]
        below[node] = mask
    return {n: below[n].bit_count() for n in order}


def plan_graph(plan: dict) -> "nx.DiGraph":
    """The stages of a loaded plan (or description) and their upstream edges, for commands that read a plan."""
    import networkx as nx

    graph = nx.DiGraph()
    graph.add_nodes_from(s["id"] for s in plan["stages"])
    graph.add_edges_from((u, s["id"]) for s in plan["stages"] for u in s.get("upstream", []) or [])
    return graph
