"""The rule catalog: load ``catalog/*.yaml`` and match rules to stages, hand-offs and the whole pipeline.

A rule's ``when`` lists stage traits; a trait given as a list matches any of its values, and every listed trait
must match. ``each: input_field`` (or ``output_field``) repeats the rule for every declared field that passes the
``field_*`` conditions. Edge rules test the upstream stage (``from``) and the downstream stage (``to``). Pipeline
rules test ``any_stage``, ``any_sink``, or ``sink``: the last stage, the one whose log ``{sink}`` reads.
"""

from __future__ import annotations

from dataclasses import dataclass
from dataclasses import field as dataclass_field
from pathlib import Path
from typing import Any, Iterator

from stagewatch import yamlio
from stagewatch.errors import StagewatchError
from stagewatch.graph import PipelineGraph
from stagewatch.resources import data_dir
from stagewatch.spec import FieldSpec, Pipeline, Stage

PIPELINE_OWNER = "pipeline"
AGGREGATES_BELOW = 0.5  # emits fewer than half the items of its busiest upstream: it groups them (a design choice)
_TRAITS = ("kind", "modality", "output", "serving", "labels", "change_rate")


@dataclass(frozen=True)
class Rule:
    id: str
    scope: str
    when: dict[str, Any]
    metrics: tuple[dict[str, Any], ...]
    file: str
    line: int | None


@dataclass
class Proposal:
    """One metric a rule proposes for one stage (or for the pipeline), before sizing."""

    owner: str  # stage id or "pipeline"
    name: str
    rule: Rule
    template: dict[str, Any]
    field: FieldSpec | None = None
    edge: tuple[str, str] | None = None
    side: str | None = None
    values: dict[str, str] = dataclass_field(default_factory=dict)

    @property
    def layer(self) -> str:
        return self.template["layer"]

    @property
    def id(self) -> str:
        return f"{self.owner}.{self.layer}.{self.name}"

    def text(self, key: str) -> str:
        return self.template[key].format(**self.values)


def load_catalog(directory: str | Path | None = None) -> list[Rule]:
    """Every rule in ``directory`` (the shipped catalog by default), in file then file-order."""
    root = Path(directory) if directory else data_dir("catalog")
    rules: list[Rule] = []
    seen: dict[str, str] = {}
    files = sorted(root.glob("*.yaml"))
    if not files:
        raise StagewatchError("no rule files (*.yaml) here", file=str(root))
    for path in files:
        doc = yamlio.load(path)
        yamlio.validate(doc, "catalog")
        for index, raw in enumerate(doc.data["rules"]):
            line = doc.line_of(("rules", index, "id"))
            if raw["id"] in seen:
                raise StagewatchError(f"rule id '{raw['id']}' is already used in {seen[raw['id']]}",
                                      file=str(path), line=line, expected="a unique rule id")
            seen[raw["id"]] = f"{path.name}"
            if raw["scope"] == "edge" and any("side" not in m for m in raw["metrics"]):
                raise StagewatchError(f"edge rule '{raw['id']}' has a metric without 'side'", file=str(path),
                                      line=line, expected="side: upstream or side: downstream")
            rules.append(Rule(id=raw["id"], scope=raw["scope"], when=raw.get("when", {}),
                              metrics=tuple(raw["metrics"]), file=str(path), line=line))
    return rules


def aggregates(stage: Stage, stages: dict[str, Stage], graph: PipelineGraph) -> bool:
    """A stage that emits far fewer items than it receives (a lot plan, a daily summary), as opposed to a gate,
    which drops items but passes the rest on one by one."""
    ups = [stages[u].volume_per_hour for u in graph.upstream(stage.id)]
    return bool(ups) and stage.output != "gate" and stage.volume_per_hour < AGGREGATES_BELOW * max(ups)


def one_to_one(pipeline: Pipeline, derived: dict[str, _Derived]) -> bool:
    """Do items flow one to one from the sources to the end? Declared in the description, else inferred: no stage
    aggregates."""
    if pipeline.one_to_one is not None:
        return pipeline.one_to_one
    return not any(d.aggregates for d in derived.values())


def modality_enters(stage: Stage, stages: dict[str, Stage], graph: PipelineGraph) -> bool:
    """Data of this stage's modality enters the pipeline here, or an upstream gate of the same modality has just
    changed it (dropped, cropped, clipped); anywhere else the same data was already checked upstream."""
    same = [stages[u] for u in graph.upstream(stage.id) if stages[u].modality == stage.modality]
    return not same or any(u.output == "gate" for u in same)


@dataclass(frozen=True)
class _Derived:
    """A stage's traits that depend on its neighbours, computed once per proposal rather than once per rule."""

    handed_over: frozenset[str]  # input fields a hand-off's contract check already covers
    own_inputs: bool  # inputs no hand-off contract covers (or no upstream at all)
    modality_enters: bool
    aggregates: bool


def _derive(pipeline: Pipeline, stages: dict[str, Stage], graph: PipelineGraph) -> dict[str, _Derived]:
    out = {}
    for stage in pipeline.stages:
        handed = frozenset(_handed_over(stage, stages, graph))
        own = not graph.upstream(stage.id) or any(f.name not in handed for f in stage.inputs)
        out[stage.id] = _Derived(handed, own, modality_enters(stage, stages, graph), aggregates(stage, stages, graph))
    return out


def _traits_match(cond: dict[str, Any], stage: Stage, pipeline: Pipeline, graph: PipelineGraph,
                  derived: dict[str, _Derived]) -> bool:
    for key in _TRAITS:
        if key in cond and getattr(stage, key) not in cond[key]:
            return False
    if "not_output" in cond and stage.output in cond["not_output"]:
        return False
    if "has_inputs" in cond and bool(stage.inputs) != cond["has_inputs"]:
        return False
    mine = derived[stage.id]
    if "has_own_inputs" in cond and mine.own_inputs != cond["has_own_inputs"]:
        return False
    if "modality_enters" in cond and mine.modality_enters != cond["modality_enters"]:
        return False
    if "aggregates" in cond and mine.aggregates != cond["aggregates"]:
        return False
    if "context" in cond and pipeline.context not in cond["context"]:
        return False
    if "has_latency_slo" in cond and (stage.latency_slo_ms is not None) != cond["has_latency_slo"]:
        return False
    if "has_upstream" in cond and bool(graph.upstream(stage.id)) != cond["has_upstream"]:
        return False
    if "has_downstream" in cond and bool(graph.downstream(stage.id)) != cond["has_downstream"]:
        return False
    return True


def _handed_over(stage: Stage, stages: dict[str, Stage], graph: PipelineGraph) -> set[str]:
    """Input fields that arrive over a hand-off, where the hand-off's contract check already covers them."""
    from stagewatch.data.contract import handoff_columns

    return {c for u in graph.upstream(stage.id) for c in handoff_columns(stages[u], stage)}


def _fields(cond: dict[str, Any], stage: Stage, derived: dict[str, _Derived]) -> Iterator[FieldSpec]:
    fields = stage.inputs if cond["each"] == "input_field" else stage.outputs
    handed = derived[stage.id].handed_over
    for f in fields:
        if "field_handed_over" in cond and (f.name in handed) != cond["field_handed_over"]:
            continue
        if "field_type" in cond and f.type not in cond["field_type"]:
            continue
        if "field_has_range" in cond and (f.range is not None) != cond["field_has_range"]:
            continue
        if "field_has_unknown" in cond and (f.unknown_value is not None) != cond["field_has_unknown"]:
            continue
        yield f


def match(rules: list[Rule], pipeline: Pipeline, graph: PipelineGraph) -> list[Proposal]:
    """Every metric the catalog proposes for ``pipeline``, stages in topological order."""
    out: list[Proposal] = []
    stages = {s.id: s for s in pipeline.stages}
    derived = _derive(pipeline, stages, graph)
    for stage_id in graph.order:
        stage = stages[stage_id]
        for rule in rules:
            if rule.scope != "stage" or not _traits_match(rule.when, stage, pipeline, graph, derived):
                continue
            values = {"stage": stage.id}
            if "each" in rule.when:
                for f in _fields(rule.when, stage, derived):
                    for template in rule.metrics:
                        v = {**values, "field": f.name}
                        out.append(Proposal(stage.id, template["name"].format(**v), rule, template, f, values=v))
            else:
                for template in rule.metrics:
                    out.append(Proposal(stage.id, template["name"].format(**values), rule, template,
                                        values=values))
    for up, down in graph.edges:
        for rule in rules:
            if rule.scope != "edge":
                continue
            if not _traits_match(rule.when.get("from", {}), stages[up], pipeline, graph, derived):
                continue
            if not _traits_match(rule.when.get("to", {}), stages[down], pipeline, graph, derived):
                continue
            values = {"upstream": up, "downstream": down}
            for template in rule.metrics:
                owner = up if template["side"] == "upstream" else down
                out.append(Proposal(owner, template["name"].format(**values), rule, template, edge=(up, down),
                                    side=template["side"], values={**values, "stage": owner}))
    sinks = [stages[s] for s in graph.sinks]
    for rule in rules:
        if rule.scope != "pipeline":
            continue
        cond = rule.when
        if "any_stage" in cond and not any(_traits_match(cond["any_stage"], s, pipeline, graph, derived)
                                           for s in pipeline.stages):
            continue
        if "any_sink" in cond and not any(_traits_match(cond["any_sink"], s, pipeline, graph, derived) for s in sinks):
            continue
        if "sink" in cond and not (sinks and _traits_match(cond["sink"], sinks[0], pipeline, graph, derived)):
            continue
        if "one_to_one" in cond and one_to_one(pipeline, derived) != cond["one_to_one"]:
            continue
        for template in rule.metrics:
            values = {"stage": PIPELINE_OWNER, "pipeline": pipeline.name}
            out.append(Proposal(PIPELINE_OWNER, template["name"].format(**values), rule, template, values=values))
    seen: dict[str, Proposal] = {}
    for proposal in out:
        if proposal.id in seen:
            other = seen[proposal.id]
            field_clash = _field_clash(pipeline, proposal, other)
            if field_clash:
                raise field_clash
            raise StagewatchError(
                f"rules '{other.rule.id}' and '{proposal.rule.id}' both propose metric '{proposal.id}'",
                file=proposal.rule.file, line=proposal.rule.line, expected="metric names unique per stage and layer")
        seen[proposal.id] = proposal
    return out


def _field_clash(pipeline: Pipeline, first: Proposal, second: Proposal) -> StagewatchError | None:
    """Two rules propose one metric id because of a field the user named: point to the field in the user's
    description, not into the catalog."""
    by_field = first if first.field is not None else second if second.field is not None else None
    if by_field is None or by_field.field is None:
        return None
    other = second if by_field is first else first
    key = "inputs" if by_field.rule.when.get("each") == "input_field" else "outputs"
    index = next(i for i, st in enumerate(pipeline.stages) if st.id == by_field.owner)
    stage = pipeline.stages[index]
    position = next(j for j, f in enumerate(getattr(stage, key)) if f.name == by_field.field.name)
    line = None
    if pipeline.source_path and Path(pipeline.source_path).is_file():
        line = yamlio.load(pipeline.source_path).line_of(("stages", index, key, position, "name"))
    where = Path(other.rule.file).name + (f":{other.rule.line}" if other.rule.line else "")
    return StagewatchError(
        f"stage '{stage.id}': the {key[:-1]} field '{by_field.field.name}' gives metric '{by_field.id}', which "
        f"rule '{other.rule.id}' ({where} in the catalog) already proposes for this stage",
        file=pipeline.source_path, line=line, expected=f"another name for the field (not '{by_field.field.name}')")
