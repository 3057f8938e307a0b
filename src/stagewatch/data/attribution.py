"""Which stage moved first: group alerting checks along the pipeline graph.

The most upstream alerting stages are the likely origins; alerting stages below an origin are listed as its
likely consequences. On a hand-off u -> v, the producer's output column (in u's log) and the consumer's input
column (in v's log) are compared: a change already in u's output travelled down; a change only in v's input
appeared after the hand-off (a join, a transport or a schema change between them). This is a likely explanation
from timing and graph position, not a proof.
"""

from __future__ import annotations

from typing import Any, Protocol, Sequence

import networkx as nx

from stagewatch.graph import plan_graph

ALERTING = ("warn", "critical")
CAVEAT = ("A likely explanation from graph position and which checks alert together, not a proof: confirm it "
          "in the logs and with the stage owners.")


class _Row(Protocol):
    id: str
    stage: str
    layer: str
    verdict: str
    columns: list[str]
    edge: dict[str, str] | None


def _producer_of(row: _Row, upstream: list[str], output_columns: dict[str, set[str]]) -> str | None:
    """The upstream stage whose hand-off an input check reads, if any."""
    if row.edge and row.edge.get("side") == "downstream":
        return row.edge["from"]
    for up in upstream:
        if set(row.columns) & output_columns.get(up, set()):
            return up
    return None


def attribute(plan: dict[str, Any], rows: Sequence[_Row]) -> list[dict[str, Any]]:
    g = plan_graph(plan)
    order = list(nx.topological_sort(g))
    alerts: dict[str, list[_Row]] = {}
    for row in rows:
        if row.verdict in ALERTING and row.stage in g:
            alerts.setdefault(row.stage, []).append(row)
    if not alerts:
        return []
    output_columns: dict[str, set[str]] = {}
    measured_out: dict[tuple[str, str], str] = {}  # (stage, column) -> worst verdict of its output checks
    for row in rows:
        if row.layer == "output":
            output_columns.setdefault(row.stage, set()).update(row.columns)
            for c in row.columns:
                before = measured_out.get((row.stage, c))
                if before not in ALERTING and row.verdict in ("ok", *ALERTING):
                    measured_out[(row.stage, c)] = row.verdict
    origins = [s for s in order if s in alerts and not (nx.ancestors(g, s) & set(alerts))]
    out = []
    for origin in origins:
        own = alerts[origin]
        inputs = [r for r in own if r.layer == "input"]
        upstream = list(g.predecessors(origin))
        after_handoff = []
        for r in inputs:
            producer = _producer_of(r, upstream, output_columns)
            if producer is None:
                continue
            shared = set(r.columns) & output_columns.get(producer, set())
            if any(measured_out.get((producer, c)) == "ok" for c in shared):
                after_handoff.append((producer, r))
        if after_handoff:
            producers = sorted({p for p, _ in after_handoff})
            where = "hand-off"
            name = ", ".join(f"{p} -> {origin}" for p in producers)
            text = (f"the change appears in {origin}'s input but not in {', '.join(producers)}'s output: it "
                    f"happened on the hand-off (a join, a transport or a schema change in between)")
        elif inputs:
            where, name = "input", origin
            text = (f"{origin}'s input changed" + (" (nothing upstream alerts)" if upstream else
                                                 " (it is where data enters the pipeline)"))
        else:
            where, name = "output", origin
            text = (f"{origin}'s output changed while its input checks stay quiet: the stage itself changed "
                    f"(a retrained model, a retuned rule, a new release)")
        consequences = []
        for stage in order:
            if stage in alerts and stage != origin and stage in nx.descendants(g, origin):
                via = []
                for up in g.predecessors(stage):
                    if up in alerts and (up == origin or up in nx.descendants(g, origin)):
                        carried = [r.id for r in alerts[up] if r.layer == "output"]
                        via.append({"from": up, "already_in_producer_output": bool(carried)})
                consequences.append({"stage": stage, "checks": [r.id for r in alerts[stage]], "via": via,
                                     "also_below": [o for o in origins if o != origin
                                                    and stage in nx.descendants(g, o)]})
        out.append({"origin": name, "stage": origin, "where": where, "explanation": text,
                    "checks": [r.id for r in own], "consequences": consequences})
    return out
