"""A plan a practitioner would sign: one check per signal, rules that fit the stage, quality by output type, whole-
pipeline metrics sized on what leaves the pipeline, and wording that agrees with itself.

The scenarios are the bundled demo and the parcel hub of tests/pipelines (a daily batch source and an aggregating
stage), which the catalog was not written against.
"""

from __future__ import annotations

import yaml

from conftest import PIPELINES, demo_path
from stagewatch import durations, fold, render
from stagewatch.catalog import load_catalog, match
from stagewatch.exporters.alert_text import FIRST_RESPONSE, FIRST_RESPONSE_AT_ENTRY
from stagewatch.graph import PipelineGraph
from stagewatch.lint import lint_file
from stagewatch.plan import all_metrics, compose
from stagewatch.spec import FieldSpec, Pipeline, Stage, load_pipeline

RULES = load_catalog()
REQUESTS = {"request_rate", "saturation", "error_budget", "latency_slo"}
MODEL = {"model_age", "dependency_changes", "inference_cost", "training_serving_skew", "model_version_mix",
         "on_device_latency", "quality", "brier_score", "absolute_error", "hit_at_k", "edit_rate"}


def _names(stage: Stage) -> set[str]:
    pipeline = Pipeline("p", [stage])
    return {p.name for p in match(RULES, pipeline, PipelineGraph.build(pipeline)) if p.owner == stage.id}


def _stage(**kw) -> Stage:
    base = dict(id="s", kind="learned", modality="tabular", output="class", serving="online",
                volume_per_hour=1000, change_rate="days", labels="delayed", label_delay="1d")
    base.update(kw)
    return Stage(**base)


def _plan(path) -> dict:
    return compose(load_pipeline(str(path)))


def _by_id(plan: dict) -> dict[str, dict]:
    return {m["id"]: m for m in all_metrics(plan)}


# --- rules that fit the stage ------------------------------------------------------------------------------------

def test_a_source_serves_no_requests_and_runs_no_model():
    for serving in ("online", "device", "batch"):
        names = _names(_stage(kind="source", output="records", serving=serving, labels="none", label_delay=None))
        assert not names & REQUESTS, serving
        assert not names & MODEL, serving
        assert "crash_or_fallback" not in names
    assert {"failed_runs", "output_age"} <= _names(_stage(kind="source", output="records", serving="batch",
                                                          run_every="1d", labels="none", label_delay=None))


def test_a_rule_based_stage_gets_no_model_metrics_and_a_learned_one_does():
    for serving in ("online", "device", "batch"):
        rule_based = _names(_stage(kind="rule-based", serving=serving))
        assert not rule_based & MODEL, serving
    assert {"model_age", "dependency_changes", "quality"} <= _names(_stage())
    assert {"crash_or_fallback", "model_version_mix"} <= _names(_stage(serving="device"))
    assert "crash_or_fallback" in _names(_stage(kind="rule-based", serving="device"))
    assert "model_version_mix" not in _names(_stage(kind="rule-based", serving="device"))


def test_each_output_type_gets_the_quality_measure_that_fits_it():
    expected = {"class": ("quality", "proportion"), "attribute": ("quality", "proportion"),
                "gate": ("quality", "proportion"), "score": ("brier_score", "mean"),
                "value": ("absolute_error", "mean"), "ranking": ("hit_at_k", "proportion"),
                "text": ("edit_rate", "mean")}
    for output, (name, statistic) in expected.items():
        pipeline = Pipeline("p", [_stage(output=output)])
        proposals = {p.name: p for p in match(RULES, pipeline, PipelineGraph.build(pipeline))}
        assert name in proposals, output
        quality = proposals[name]
        assert quality.template["statistic"] == statistic and quality.template.get("on_labels"), output
    plan = compose(Pipeline("p", [_stage(output="score", outputs=[FieldSpec("risk", "numeric", range=[0, 1])])]))
    brier = _by_id(plan)["s.output.brier_score"]
    assert brier["reads"] == {"column": "risk", "other_column": "risk_label", "transform": "squared_error"}
    value = compose(Pipeline("p", [_stage(output="value", outputs=[FieldSpec("eta_min", "numeric")])]))
    assert _by_id(value)["s.output.absolute_error"]["reads"]["transform"] == "abs_error"


def test_first_response_at_the_entry_does_not_send_the_reader_upstream():
    assert "upstream" in FIRST_RESPONSE["input"]
    assert "upstream stage" not in FIRST_RESPONSE_AT_ENTRY["input"]
    assert "enters the pipeline" in FIRST_RESPONSE_AT_ENTRY["input"]


# --- one check per signal ----------------------------------------------------------------------------------------

def test_no_two_live_checks_read_one_signal_and_every_hand_off_side_is_still_seen():
    for path in (demo_path(), PIPELINES / "parcel_hub.yaml", PIPELINES / "bikeshare.yaml"):
        plan = _plan(path)
        assert not fold.duplicates(all_metrics(plan)), path
        metrics = {s["id"]: s["metrics"] for s in plan["stages"]}
        for stage in plan["stages"]:
            for up in stage.get("upstream", []):
                assert fold.on_handoff(metrics[up], up, stage["id"], "upstream") or \
                    fold.on_handoff(metrics[stage["id"]], up, stage["id"], "downstream")
    demo = _by_id(_plan(demo_path()))
    drift = demo["blemish_scorer.output.score_drift"]
    assert {r["metric"] for r in drift["serves"]} == {"blemish_scorer.output.blemish_score_drift",
                                                       "blemish_scorer.output.to_grade_assigner_drift"}
    # the consumer's side is read in the consumer's log: a different observation point, its own check
    assert "grade_assigner.input.blemish_score_drift" in demo
    unknown = demo["variety_tagger.output.unknown_share"]
    assert unknown["severity"] == "page" and len(unknown["serves"]) == 2


def test_a_value_column_gets_one_distribution_check_and_a_mean_check():
    # PSI and KS both judge the whole shape of a column: one of them per column of a log; a mean shift judges
    # location only and stays beside it.
    plan = compose(Pipeline("p", [_stage(output="value", outputs=[FieldSpec("eta_min", "numeric")]),
                                  _stage(id="t", kind="rule-based", output="records", upstream=["s"])]))
    on_column = [m for m in all_metrics(plan) if m["id"].startswith("s.") and m["statistic"] in ("psi", "ks", "mean")
                 and m["reads"] == {"column": "eta_min"}]
    assert sorted((m["id"], m["statistic"]) for m in on_column) == [("s.output.value_drift", "psi"),
                                                                      ("s.output.value_mean", "mean")]
    drift = _by_id(plan)["s.output.value_drift"]
    assert {r["metric"] for r in drift["serves"]} == {"s.output.eta_min_drift", "s.output.to_t_drift"}
    # a duration handed over to a consumer that declares it: one PSI in the consumer's log, both sides alike
    handed = compose(Pipeline("p", [_stage(output="value", outputs=[FieldSpec("wait", "duration")]),
                                    _stage(id="t", output="score", upstream=["s"],
                                           inputs=[FieldSpec("wait", "duration")])]))
    assert not fold.duplicates(all_metrics(handed))
    consumer = [(m["id"], m["statistic"]) for m in all_metrics(handed)
                if m["id"].startswith("t.input.") and m["reads"] == {"column": "wait"}]
    assert consumer == [("t.input.wait_drift", "psi")]


def test_modality_checks_run_where_images_enter_and_again_after_the_gate_only():
    demo = _by_id(_plan(demo_path()))
    with_brightness = sorted(m.split(".")[0] for m in demo if m.endswith(".input.brightness"))
    # line_camera: where images enter; the frame gate sees the camera's frames unchanged; the two models see the
    # gate's crops
    assert with_brightness == ["blemish_scorer", "line_camera", "variety_tagger"]


def test_lint_flags_two_live_checks_on_one_signal(tmp_path):
    plan = _plan(demo_path())
    stage = next(s for s in plan["stages"] if s["id"] == "blemish_scorer")
    twin = dict(next(m for m in stage["metrics"] if m["id"] == "blemish_scorer.output.score_drift"))
    twin.update(id="blemish_scorer.output.score_drift_again", source="manual", status="accepted")
    twin.pop("serves", None)
    stage["metrics"].append(twin)
    path = tmp_path / "plan.yaml"
    path.write_text(yaml.safe_dump(plan, sort_keys=False))
    findings = [f for f in lint_file(str(path)) if f.code == "duplicate-signal"]
    assert [f.subject for f in findings] == ["blemish_scorer.output.score_drift_again"]
    assert findings[0].line and "id: blemish_scorer.output.score_drift_again" in \
        path.read_text().splitlines()[findings[0].line - 1]
    twin["status"] = "rejected"
    twin["note"] = "kept for the record"
    path.write_text(yaml.safe_dump(plan, sort_keys=False))
    assert not [f for f in lint_file(str(path)) if f.code == "duplicate-signal"]


def test_lint_flags_psi_and_ks_on_one_column_but_not_a_mean_beside_them(tmp_path):
    plan = _plan(demo_path())
    stage = next(s for s in plan["stages"] if s["id"] == "blemish_scorer")
    drift = next(m for m in stage["metrics"] if m["id"] == "blemish_scorer.output.score_drift")
    shape = dict(drift, id="blemish_scorer.output.score_ks", statistic="ks", params={}, source="manual",
                 status="accepted")
    mean = dict(drift, id="blemish_scorer.output.score_mean", statistic="mean", params={}, source="manual",
                status="accepted", direction="both")
    for twin in (shape, mean):
        twin.pop("serves", None)
        stage["metrics"].append(twin)
    path = tmp_path / "plan.yaml"
    path.write_text(yaml.safe_dump(plan, sort_keys=False))
    findings = [f for f in lint_file(str(path)) if f.code == "duplicate-signal"]
    assert [f.subject for f in findings] == ["blemish_scorer.output.score_ks"]
    assert "two distribution statistics (PSI and KS)" in findings[0].message


# --- batch cadence, aggregation and whole-pipeline sizing ---------------------------------------------------------

def test_the_parcel_hub_plan_fits_its_daily_batch_and_its_aggregating_stage():
    plan = _plan(PIPELINES / "parcel_hub.yaml")
    metrics = _by_id(plan)
    stages = {s["id"]: s for s in plan["stages"]}
    for stage in stages.values():
        if not stage.get("run_every"):
            continue
        period = durations.parse(stage["run_every"])
        for m in stage["metrics"]:
            if m["statistic"] not in ("level", "burn_rate"):
                assert durations.parse(m["window"]) % period == 0, m["id"]  # whole runs
    age = metrics["carrier_manifest.software.output_age"]
    assert age["warn"] > 1 and age["critical"] > age["warn"]  # the period plus a margin, in run intervals
    # truck_loader turns 19,000 parcels an hour into 60 loads: no end-to-end drop share, a yield check instead
    assert "pipeline.output.end_to_end_drop" not in metrics
    assert metrics["truck_loader.output.items_per_output"]["statistic"] == "mean"
    # end-to-end latency is sized on what leaves the pipeline (60 loads an hour), not the 20,800 items entering
    assert metrics["pipeline.software.end_to_end_latency"]["sizing"]["derivation"].startswith("60 items per hour")


def test_a_one_to_one_pipeline_keeps_its_end_to_end_drop_share(tmp_path):
    text = (PIPELINES / "parcel_hub.yaml").read_text().replace("pipeline: parcel-hub",
                                                               "pipeline: parcel-hub\none_to_one: true")
    path = tmp_path / "declared.yaml"
    path.write_text(text)
    assert "pipeline.output.end_to_end_drop" in _by_id(_plan(path))


# --- wording -----------------------------------------------------------------------------------------------------

def test_a_lower_tail_check_is_sized_as_one():
    blur = _by_id(_plan(demo_path()))["line_camera.input.blurred_share"]
    assert "below the reference 5th percentile" in blur["measure"]
    assert "below the reference 0.05-quantile" in blur["sizing"]["derivation"]
    assert "above the reference" not in blur["sizing"]["derivation"]


def test_watch_first_lists_every_stage_tied_with_the_last_one_shown():
    plan = {"stages": [{"id": s, "downstream_reach": r} for s, r in
                       (("a", 5), ("b", 3), ("c", 1), ("d", 1), ("e", 1), ("f", 0))]}
    assert [s["id"] for s in render.watch_first(plan)] == ["a", "b", "c", "d", "e"]
    demo = _plan(demo_path())
    top = render.watch_first(demo)
    cutoff = sorted((s["downstream_reach"] for s in demo["stages"]), reverse=True)[2]
    assert {s["id"] for s in top} == {s["id"] for s in demo["stages"] if s["downstream_reach"] >= cutoff}
