"""The pipeline description: load, validate, fill defaults.

A description is YAML with the keys of ``schemas/pipeline.schema.json``. ``load_pipeline`` is the one way in; it
raises :class:`StagewatchError` naming file and line for anything wrong.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from stagewatch import durations, yamlio
from stagewatch.errors import StagewatchError
from stagewatch.names import first_collision

# Rule of thumb of the trade (common practice): business and machine data shifts within hours, a large consumer
# population within days to weeks.
DEFAULT_CHANGE_RATE = {"business": "hours", "consumer": "days"}
DEFAULT_LABEL_DELAY = "1d"
DEFAULT_SLO_TARGET = 0.999
DEFAULT_SLO_PERIOD = "30d"

def batch_change_rate(run_every: str | None) -> str | None:
    """The default change rate of a batch stage follows its period: data can only move once a run."""
    if not run_every or not durations.is_duration(run_every):
        return None
    seconds = durations.parse(run_every)
    for rate, longest in (("minutes", 15 * 60), ("hours", 6 * 3600), ("days", 7 * 86400)):
        if seconds <= longest:
            return rate
    return "months"


FIELD_KEYS = ("name", "type", "unknown_value", "range", "categories", "description", "renamed_from")


@dataclass
class FieldSpec:
    name: str
    type: str
    unknown_value: Any = None
    range: list[float] | None = None
    categories: list[Any] | None = None
    description: str | None = None
    renamed_from: str | None = None

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for key in FIELD_KEYS:
            value = getattr(self, key)
            if value is not None:
                out[key] = value
        return out


@dataclass
class Stage:
    id: str
    kind: str
    modality: str
    output: str
    serving: str
    volume_per_hour: float
    change_rate: str
    labels: str = "none"
    label_delay: str | None = None
    labelled_share: float | None = None
    latency_slo_ms: float | None = None
    slo_target: float | None = None
    slo_period: str | None = None
    run_every: str | None = None
    description: str | None = None
    owner: str | None = None
    renamed_from: str | None = None  # the stage's earlier id: its reviewed metrics move to this one
    upstream: list[str] = field(default_factory=list)
    inputs: list[FieldSpec] = field(default_factory=list)
    outputs: list[FieldSpec] = field(default_factory=list)

    @property
    def labelled_per_hour(self) -> float:
        return self.volume_per_hour * (self.labelled_share if self.labelled_share is not None else 1.0)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"id": self.id}
        for key in ("renamed_from", "description", "kind", "modality", "output", "upstream", "serving", "volume_per_hour",
                    "change_rate", "labels", "label_delay", "labelled_share", "latency_slo_ms", "slo_target",
                    "slo_period", "run_every", "owner"):
            value = getattr(self, key)
            if value is not None:
                out[key] = list(value) if isinstance(value, list) else value
        if self.inputs:
            out["inputs"] = [f.to_dict() for f in self.inputs]
        if self.outputs:
            out["outputs"] = [f.to_dict() for f in self.outputs]
        return out


@dataclass
class Pipeline:
    name: str
    stages: list[Stage]
    context: str = "consumer"
    false_alarms_per_week: float = 1.0
    false_tickets_per_week: float = 5.0
    thresholds_from_data: str = "raise"
    one_to_one: bool | None = None  # items flow one to one from sources to the end; None: inferred from volumes
    owner: str | None = None
    description: str | None = None
    source_path: str | None = None

    def stage(self, stage_id: str) -> Stage:
        for stage in self.stages:
            if stage.id == stage_id:
                return stage
        raise KeyError(stage_id)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"pipeline": self.name}
        if self.description is not None:
            out["description"] = self.description
        out["context"] = self.context
        out["false_alarms_per_week"] = self.false_alarms_per_week
        out["false_tickets_per_week"] = self.false_tickets_per_week
        if self.thresholds_from_data != "raise":
            out["thresholds_from_data"] = self.thresholds_from_data
        if self.one_to_one is not None:
            out["one_to_one"] = self.one_to_one
        if self.owner is not None:
            out["owner"] = self.owner
        out["stages"] = [s.to_dict() for s in self.stages]
        return out


def _field(data: dict[str, Any]) -> FieldSpec:
    return FieldSpec(name=data["name"], type=data["type"], unknown_value=data.get("unknown_value"),
                     range=data.get("range"), categories=data.get("categories"),
                     description=data.get("description"), renamed_from=data.get("renamed_from"))


def from_document(doc: yamlio.Document) -> Pipeline:
    """Build a :class:`Pipeline` from parsed YAML, validating it against the schema and the rules between keys."""
    if not isinstance(doc.data, dict):
        raise StagewatchError("a pipeline description is a mapping with 'pipeline' and 'stages'", file=doc.path,
                              line=1, expected="pipeline: NAME, stages: [...]")
    if "plan_version" in doc.data:
        beside = Path(doc.path).with_name(Path(doc.path).stem + ".pipeline.yaml")
        which = (f"here, most likely {beside}, which the interview wrote beside the plan" if beside.is_file() else
                 "the file the plan was proposed from (the interview writes it beside the plan as "
                 "PLAN.pipeline.yaml)")
        raise StagewatchError(f"this is a plan, not a pipeline description: give the pipeline description "
                              f"{which}", file=doc.path, line=doc.line_of(["plan_version"]),
                              expected="a pipeline description: pipeline: NAME, stages: [...]")
    yamlio.validate(doc, "pipeline")
    data = doc.data
    context = data.get("context", "consumer")
    stages = []
    for index, raw in enumerate(data["stages"]):
        where = ("stages", index)

        def fail(key: str, message: str, expected: str | None = None) -> StagewatchError:
            return StagewatchError(f"stage '{raw['id']}': {message}", file=doc.path,
                                   line=doc.line_of((*where, key)), expected=expected)

        labels = raw.get("labels", "none")
        if raw["id"] == "pipeline":
            raise fail("id", "the id 'pipeline' is reserved for metrics of the whole pipeline",
                       "another stage id")
        if labels == "delayed" and "label_delay" not in raw:
            raise fail("labels", "labels are delayed but no label_delay is given",
                       "label_delay: a duration such as 3d")
        if labels != "delayed" and "label_delay" in raw:
            raise fail("label_delay", f"label_delay is set but labels is '{labels}'", "labels: delayed")
        if raw["serving"] != "online" and "latency_slo_ms" in raw:
            raise fail("latency_slo_ms", f"a latency SLO only applies to online stages, this one is {raw['serving']}")
        if raw["kind"] == "source" and labels != "none":
            raise fail("labels", "a source stage makes no predictions to label", "labels: none")
        for key in ("inputs", "outputs"):
            names = [f["name"] for f in raw.get(key, [])]
            dupes = sorted({n for n in names if names.count(n) > 1})
            if dupes:
                raise fail(key, f"field names repeat in {key}: {', '.join(dupes)}", "each field name once")
            clash = first_collision((n, i) for i, n in enumerate(names))
            if clash:
                (first, i), (second, j), output, form = clash
                raise StagewatchError(
                    f"stage '{raw['id']}': {key} '{first}' (line {doc.line_of((*where, key, i, 'name'))}) and "
                    f"'{second}' (line {doc.line_of((*where, key, j, 'name'))}) both become '{form}' in {output}",
                    file=doc.path, line=doc.line_of((*where, key, j, "name")),
                    expected="field names that differ in more than _")
            for f_index, f in enumerate(raw.get(key, [])):
                if "range" in f and f["range"][0] >= f["range"][1]:
                    raise StagewatchError(f"stage '{raw['id']}': field '{f['name']}' range must be [low, high]",
                                          file=doc.path, line=doc.line_of((*where, key, f_index, "range")),
                                          expected="low < high")
        stages.append(
            Stage(
                id=raw["id"],
                kind=raw["kind"],
                modality=raw["modality"],
                output=raw["output"],
                serving=raw["serving"],
                volume_per_hour=raw["volume_per_hour"],
                change_rate=raw.get("change_rate", batch_change_rate(raw.get("run_every"))
                                    or DEFAULT_CHANGE_RATE[context]),
                labels=labels,
                label_delay=raw.get("label_delay"),
                labelled_share=raw.get("labelled_share"),
                latency_slo_ms=raw.get("latency_slo_ms"),
                slo_target=raw.get("slo_target"),
                slo_period=raw.get("slo_period"),
                run_every=raw.get("run_every"),
                description=raw.get("description"),
                owner=raw.get("owner"),
                renamed_from=raw.get("renamed_from"),
                upstream=list(raw.get("upstream", [])),
                inputs=[_field(f) for f in raw.get("inputs", [])],
                outputs=[_field(f) for f in raw.get("outputs", [])],
            )
        )
    ids = {s.id for s in stages}
    for index, s in enumerate(stages):
        if s.renamed_from and s.renamed_from in ids:
            raise StagewatchError(f"stage '{s.id}': renamed_from '{s.renamed_from}' is still a stage of this pipeline",
                                  file=doc.path, line=doc.line_of(("stages", index, "renamed_from")),
                                  expected="the id the stage had before, which no stage has now")
    pipeline = Pipeline(
        name=data["pipeline"],
        stages=stages,
        context=context,
        false_alarms_per_week=data.get("false_alarms_per_week", 1),
        false_tickets_per_week=data.get("false_tickets_per_week", 5),
        thresholds_from_data=data.get("thresholds_from_data", "raise"),
        one_to_one=data.get("one_to_one"),
        owner=data.get("owner"),
        description=data.get("description"),
        source_path=doc.path,
    )
    return pipeline


def load_pipeline(path: str) -> Pipeline:
    """Read and validate a pipeline description, then check its graph (ids, upstream references, cycles)."""
    from stagewatch.graph import PipelineGraph  # the graph checks need the stages first

    doc = yamlio.load(path)
    pipeline = from_document(doc)
    PipelineGraph.build(pipeline, doc)
    return pipeline


def slo_period_seconds(stage: Stage) -> int:
    return durations.parse(stage.slo_period or DEFAULT_SLO_PERIOD)
