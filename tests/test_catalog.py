"""The rule catalog: size, form, and what it proposes for each kind of stage and hand-off."""

from __future__ import annotations

import itertools

import pytest

from conftest import all_pipelines
from stagewatch.catalog import load_catalog, match
from stagewatch.errors import StagewatchError
from stagewatch.graph import PipelineGraph
from stagewatch.spec import FieldSpec, Pipeline, Stage, load_pipeline

RULES = load_catalog()


def _ids(pipeline):
    return {p.id: p for p in match(RULES, pipeline, PipelineGraph.build(pipeline))}


def test_catalog_has_at_least_40_rules_each_explained():
    assert len(RULES) >= 40
    for rule in RULES:
        for metric in rule.metrics:
            assert metric["why"].strip().endswith(".")
            assert metric["catches"]


def _stage(**kw):
    base = dict(id="s", kind="learned", modality="tabular", output="score", serving="online",
                volume_per_hour=1000, change_rate="days")
    base.update(kw)
    return Stage(**base)


def test_serving_modes_get_their_software_metrics():
    online = _ids(Pipeline("p", [_stage(latency_slo_ms=50)]))
    assert {"s.software.latency_slo", "s.software.error_budget", "s.software.request_rate",
            "s.software.saturation"} <= set(online)
    batch = _ids(Pipeline("p", [_stage(serving="batch")]))
    assert {"s.software.failed_runs", "s.software.run_duration", "s.software.output_age",
            "s.software.rows_written"} <= set(batch)
    device = _ids(Pipeline("p", [_stage(serving="device")]))
    assert {"s.software.crash_or_fallback", "s.software.model_version_mix", "s.software.on_device_latency"} <= set(device)


def test_fields_expand_per_declared_type():
    stage = _stage(inputs=[FieldSpec("temp", "numeric", range=[0, 1]), FieldSpec("site", "category"),
                           FieldSpec("note", "text")])
    ids = _ids(Pipeline("p", [stage]))
    assert {"s.input.temp_drift", "s.input.temp_missing", "s.input.temp_out_of_range", "s.input.site_mix",
            "s.input.site_unseen", "s.input.note_length", "s.input.note_empty"} <= set(ids)
    assert ids["s.input.temp_drift"].field.name == "temp"


@pytest.mark.parametrize("modality,expected", [
    ("audio", {"clip_duration", "loudness", "silence_share"}),
    ("image", {"brightness", "resolution_mix", "blurred_share"}),
    ("events", {"events_per_entity", "session_length"}),
    ("text", {"text_length", "text_empty"}),
])
def test_modalities_get_their_input_metrics(modality, expected):
    ids = _ids(Pipeline("p", [_stage(modality=modality)]))
    assert {f"s.input.{name}" for name in expected} <= set(ids)


def test_outputs_gates_attributes_and_labels():
    gate = _ids(Pipeline("p", [_stage(kind="rule-based", output="gate")]))
    assert {"s.output.pass_rate", "s.output.clipped_length"} <= set(gate)
    attribute = _ids(Pipeline("p", [_stage(output="attribute", labels="delayed", label_delay="3d")]))
    assert {"s.output.unknown_share", "s.output.quality"} <= set(attribute)
    assert "s.output.quality_proxy" not in attribute


def test_every_edge_is_checked_on_both_sides_with_the_same_statistic():
    for path in all_pipelines():
        pipeline = load_pipeline(str(path))
        graph = PipelineGraph.build(pipeline)
        proposals = match(RULES, pipeline, graph)
        for up, down in graph.edges:
            sides = {(p.side, p.template["statistic"]) for p in proposals if p.edge == (up, down)}
            up_stats = {s for side, s in sides if side == "upstream"}
            down_stats = {s for side, s in sides if side == "downstream"}
            assert up_stats, (path.name, up, down)
            assert up_stats <= down_stats, (path.name, up, down)
            assert any(p.rule.id == "cascade.contract" and p.edge == (up, down) for p in proposals)


def test_learned_stages_get_all_seven_ml_test_score_checks():
    # Breck et al., "The ML Test Score", IEEE Big Data 2017: seven production-monitoring checks.
    for labels in ("none", "delayed"):
        extra = {"label_delay": "1d"} if labels == "delayed" else {}
        proposals = _ids(Pipeline("p", [_stage(labels=labels, **extra)])).values()
        covered = {n for p in proposals for n in p.template.get("ml_test_score", [])}
        assert covered == set(range(1, 8))


def test_every_kind_of_stage_gets_all_three_layers():
    for kind, modality, output, serving in itertools.product(
            ("learned", "rule-based", "source"), ("audio", "image", "video", "text", "tabular", "events",
                                                   "timeseries"),
            ("gate", "segments", "class", "attribute", "score", "value", "ranking", "text", "records"),
            ("online", "batch", "device")):
        proposals = _ids(Pipeline("p", [_stage(kind=kind, modality=modality, output=output,
                                               serving=serving)])).values()
        expected = {"software", "input", "output"}
        if kind == "source" and serving != "batch":
            expected.discard("software")  # a sensor or outside feed runs none of the team's software (lint agrees)
        assert {p.layer for p in proposals if p.owner != "pipeline"} == expected, (kind, modality, output, serving)


def test_duplicate_rule_ids_are_rejected(tmp_path):
    text = "rules:\n" + "".join(
        f"  - id: same\n    scope: pipeline\n    metrics:\n      - {{name: m{i}, layer: output, measure: x, "
        f"statistic: level, direction: above, severity: ticket, catches: [fault], why: y.}}\n" for i in range(2))
    (tmp_path / "a.yaml").write_text(text)
    with pytest.raises(StagewatchError, match="already used") as info:
        load_catalog(tmp_path)
    assert info.value.line == 6


@pytest.mark.parametrize("output,name,reads", [
    ("value", "final_absolute_error", {"transform": "abs_error"}),
    ("score", "final_brier_score", {"transform": "squared_error"}),
    ("class", "final_quality", {"condition": "disagrees"}),
    ("attribute", "final_quality", {"condition": "disagrees"}),
])
def test_the_pipeline_quality_check_judges_the_last_stage_by_its_output_type(output, name, reads):
    from stagewatch.plan import compose

    sink = _stage(id="last", kind="rule-based", output=output, labels="delayed", label_delay="1d", upstream=["s"])
    plan = compose(Pipeline("p", [_stage(output="records", kind="source"), sink]))
    [quality] = [m for m in plan["pipeline_metrics"] if m.get("on_labels")]
    assert quality["id"] == f"pipeline.output.{name}"
    assert reads.items() <= quality["reads"].items() and quality["reads"]["stage"] == "last"


def test_a_learned_last_stage_judged_on_labels_carries_the_pipeline_quality_check():
    from stagewatch.plan import compose

    sink = _stage(id="last", output="value", labels="delayed", label_delay="1d", upstream=["s"])
    plan = compose(Pipeline("p", [_stage(output="records", kind="source"), sink]))
    assert not [m for m in plan["pipeline_metrics"] if m.get("on_labels")]
    [own] = [m for s in plan["stages"] for m in s["metrics"] if m["id"] == "last.output.absolute_error"]
    assert {"metric": "pipeline.output.final_absolute_error"} in own["serves"]


def test_text_received_from_an_upstream_stage_is_read_under_its_name_and_checked_once():
    """camera -> OCR (text) -> rule-based gate -> parser: the gate's own text checks and the consumer side of the
    hand-off read the column the OCR stage writes, so they fold into one check and no log is asked for a `text`
    column nothing writes."""
    from stagewatch.data import contract
    from stagewatch.fold import duplicates
    from stagewatch.plan import compose

    stages = [
        _stage(id="label_camera", kind="source", modality="image", output="records"),
        _stage(id="ocr_reader", modality="image", output="text", upstream=["label_camera"],
               outputs=[FieldSpec("label_text", "text")]),
        _stage(id="address_gate", kind="rule-based", modality="text", output="gate", upstream=["ocr_reader"]),
        _stage(id="address_parser", modality="text", output="attribute", upstream=["address_gate"]),
    ]
    plan = compose(Pipeline("labels", stages))
    metrics = {m["id"]: m for s in plan["stages"] for m in s["metrics"]}
    length = metrics["address_gate.input.text_length"]
    assert length["reads"] == {"column": "label_text", "transform": "length"}
    assert "address_gate.input.from_ocr_reader_length" not in metrics
    assert {"metric": "address_gate.input.from_ocr_reader_length",
            "edge": {"from": "ocr_reader", "to": "address_gate", "side": "downstream"}} in length["serves"]
    assert not duplicates([*metrics.values(), *plan["pipeline_metrics"]])
    columns = contract.log_columns(plan)
    assert "text" not in columns["address_gate"] and "text" not in columns["address_parser"]
    assert "label_text" in columns["address_parser"]  # the text the gate passed on, as the OCR stage wrote it
