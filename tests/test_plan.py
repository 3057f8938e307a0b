"""Plans: deterministic output, and merges that never lose a reviewer's edit."""

from __future__ import annotations

import yaml

from conftest import SMALL, all_pipelines
from stagewatch import plan as plan_mod
from stagewatch.propose import propose


def _metrics(path):
    data = yaml.safe_load(path.read_text())
    return {m["id"]: m for m in plan_mod.all_metrics(data) + data.get("retired_metrics", [])}


def _edit(path, metric_id, **changes):
    data = yaml.safe_load(path.read_text())
    for m in plan_mod.all_metrics(data):
        if m["id"] == metric_id:
            m.update(changes)
    path.write_text(yaml.safe_dump(data, sort_keys=False))


def test_same_input_gives_a_byte_identical_plan(tmp_path):
    for source in all_pipelines():
        first, _ = propose(str(source), None)
        second, _ = propose(str(source), None)
        assert first == second
        assert first.startswith("# stagewatch plan")
        assert "stagewatch schema plan" in first.splitlines()[1]


def test_rerun_on_an_untouched_plan_changes_nothing(tmp_path, write):
    source = write("p.yaml", SMALL)
    out = tmp_path / "plan.yaml"
    propose(str(source), str(out))
    before = out.read_bytes()
    _, rep = propose(str(source), str(out))
    assert out.read_bytes() == before
    assert not rep.kept_edits and not rep.stale and rep.refreshed


def test_edit_reject_and_note_survive_a_rerun(tmp_path, write):
    source = write("p.yaml", SMALL)
    out = tmp_path / "plan.yaml"
    propose(str(source), str(out))
    _edit(out, "scorer.output.score_drift", critical=0.3, warn=0.15)
    _edit(out, "feed.input.amount_out_of_range", status="rejected", note="amount is clipped at the source")
    _edit(out, "scorer.software.saturation", note="watch the GPU pool, not CPU")
    _, rep = propose(str(source), str(out))
    after = _metrics(out)
    assert after["scorer.output.score_drift"]["critical"] == 0.3
    assert after["scorer.output.score_drift"]["warn"] == 0.15
    assert after["feed.input.amount_out_of_range"]["status"] == "rejected"
    assert after["feed.input.amount_out_of_range"]["note"] == "amount is clipped at the source"
    assert after["scorer.software.saturation"]["note"] == "watch the GPU pool, not CPU"
    assert set(rep.kept_edits) == {"scorer.output.score_drift", "feed.input.amount_out_of_range",
                                   "scorer.software.saturation"}
    # Sizing of an edited metric is recomputed to explain the reviewer's numbers.
    assert "sizing" in after["scorer.output.score_drift"]
    # A third run keeps them again.
    propose(str(source), str(out))
    assert _metrics(out)["scorer.output.score_drift"]["critical"] == 0.3


def test_new_stage_adds_metrics_and_removed_rule_marks_stale(tmp_path, write):
    source = write("p.yaml", SMALL)
    out = tmp_path / "plan.yaml"
    propose(str(source), str(out))
    _edit(out, "scorer.software.latency_slo", status="accepted")
    _edit(out, "scorer.output.score_drift", critical=0.3, note="scores are sharper since v4")
    grown = SMALL + """
  - id: ranker
    kind: rule-based
    modality: tabular
    output: ranking
    upstream: [scorer]
    serving: batch
    volume_per_hour: 1000
"""
    # The latency SLO goes away: its rule no longer applies to scorer.
    source.write_text(grown.replace("    latency_slo_ms: 50\n", "").replace("pipeline: tiny", "pipeline: tiny\n",
                                                                         1).lstrip())
    source.write_text(source.read_text().replace("\n\ncontext", "\ncontext"))
    _, rep = propose(str(source), str(out))
    after = _metrics(out)
    assert any(mid.startswith("ranker.") for mid in rep.added)
    # The scores scorer sends to ranker are the scores it emits: one check, now serving a second role (the
    # hand-off's upstream side), keeps the reviewer's edit; the consumer's side is its own check in ranker's log.
    drift = after["scorer.output.score_drift"]
    assert "scorer.output.to_ranker_drift" not in after and "ranker.input.from_scorer_drift" in after
    assert drift["critical"] == 0.3 and drift["note"] == "scores are sharper since v4"
    assert {"from": "scorer", "to": "ranker", "side": "upstream"} in [r.get("edge") for r in drift["serves"]]
    stale = after["scorer.software.latency_slo"]
    assert stale["status"] == "stale" and stale["previous_status"] == "accepted"
    # The rule applies again: the reviewer's status comes back.
    source.write_text(source.read_text().replace("    serving: online\n    volume_per_hour: 1000\n",
                                                 "    serving: online\n    volume_per_hour: 1000\n"
                                                 "    latency_slo_ms: 50\n", 1))
    propose(str(source), str(out))
    assert _metrics(out)["scorer.software.latency_slo"]["status"] == "accepted"


def test_removed_stage_keeps_its_metrics_as_retired(tmp_path, write):
    source = write("p.yaml", SMALL)
    out = tmp_path / "plan.yaml"
    propose(str(source), str(out))
    _edit(out, "scorer.output.score_drift", note="keep")
    text = SMALL.split("  - id: scorer")[0]
    source.write_text(text.lstrip())
    propose(str(source), str(out))
    data = yaml.safe_load(out.read_text())
    retired = {m["id"]: m for m in data["retired_metrics"]}
    assert retired["scorer.output.score_drift"]["note"] == "keep"
    assert all(m["status"] == "stale" for m in retired.values())


def test_manual_metric_is_kept(tmp_path, write):
    source = write("p.yaml", SMALL)
    out = tmp_path / "plan.yaml"
    propose(str(source), str(out))
    data = yaml.safe_load(out.read_text())
    data["stages"][1]["metrics"].append({
        "id": "scorer.output.refund_share", "layer": "output", "status": "accepted", "source": "manual",
        "measure": "share of scored items later refunded", "statistic": "proportion", "params": {"baseline": 0.02},
        "window": "1d", "reference": "28d", "warn": 0.01, "critical": 0.03, "direction": "above",
        "severity": "ticket", "catches": ["concept-drift"], "why": "Refunds are the business outcome."})
    out.write_text(yaml.safe_dump(data, sort_keys=False))
    propose(str(source), str(out))
    kept = _metrics(out)["scorer.output.refund_share"]
    assert kept["source"] == "manual" and kept["critical"] == 0.03
    assert kept["sizing"]["samples_per_window"] == 24000


def test_untouched_metrics_follow_a_volume_change(tmp_path, write):
    source = write("p.yaml", SMALL)
    out = tmp_path / "plan.yaml"
    propose(str(source), str(out))
    before = _metrics(out)["scorer.output.score_drift"]["sizing"]["samples_per_window"]
    source.write_text(source.read_text().replace("volume_per_hour: 1000\n    latency", "volume_per_hour: 5000\n"
                                                                                         "    latency"))
    propose(str(source), str(out))
    after = _metrics(out)["scorer.output.score_drift"]["sizing"]["samples_per_window"]
    assert after == 5 * before


def test_failed_propose_writes_nothing(tmp_path, write):
    source = write("p.yaml", SMALL)
    out = tmp_path / "plan.yaml"
    propose(str(source), str(out))
    before = out.read_bytes()
    source.write_text(SMALL.replace("upstream: [feed]", "upstream: [nobody]"))
    import pytest

    from stagewatch.errors import StagewatchError

    with pytest.raises(StagewatchError):
        propose(str(source), str(out))
    assert out.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_window_auto_written_by_a_reviewer_is_sized_again(tmp_path, write):
    source = write("p.yaml", SMALL)
    out = tmp_path / "plan.yaml"
    propose(str(source), str(out))
    _edit(out, "scorer.output.score_drift", window="auto", note="size this again please")
    propose(str(source), str(out))
    metric = _metrics(out)["scorer.output.score_drift"]
    assert metric["window"] != "auto" and metric["note"] == "size this again please"


def _metric_blocks(text: str) -> dict[str, str]:
    """Each metric's lines in the written plan, by id."""
    blocks: dict[str, str] = {}
    current = None
    for line in text.splitlines():
        stripped = line.strip()
        if stripped.startswith("- id: ") and "." in stripped:
            current = stripped[len("- id: "):]
            blocks[current] = ""
        elif stripped.startswith("- id: ") or not line.startswith(" "):
            current = None
        if current:
            blocks[current] += line + "\n"
    return blocks


def _touches(metric: dict, stage: str) -> bool:
    sides = [metric.get("edge") or {}] + [r.get("edge") or {} for r in metric.get("serves", [])]
    return metric["id"].startswith(stage + ".") or any(stage in (e.get("from"), e.get("to")) for e in sides)


def test_a_change_to_one_stage_changes_no_line_of_any_other_stage(tmp_path):
    """Stable plans: the budget is split per stage before it is split per check, and shares sit on a 1-2-5
    ladder, so changing one stage's volume, or rejecting one of its checks, leaves every other stage's metrics
    byte for byte as they were (hand-off checks sized on that stage's volume aside)."""
    from conftest import demo_path

    description = yaml.safe_load(demo_path().read_text())
    source = tmp_path / "pipeline.yaml"
    out = tmp_path / "plan.yaml"
    source.write_text(yaml.safe_dump(description, sort_keys=False))
    propose(str(source), str(out))
    before_text = out.read_text()
    before = _metrics(out)
    assert len(description["stages"]) == 7
    for stage in description["stages"]:
        if stage["id"] == "variety_tagger":
            stage["volume_per_hour"] *= 2
    source.write_text(yaml.safe_dump(description, sort_keys=False))
    _edit(out, "variety_tagger.output.confidence", status="rejected", note="confidence is not calibrated yet")
    propose(str(source), str(out))
    old, new = _metric_blocks(before_text), _metric_blocks(out.read_text())
    assert set(old) == set(new)
    changed = {mid for mid in old if old[mid] != new[mid]}
    assert changed, "the change must show somewhere"
    assert all(_touches(before[mid], "variety_tagger") for mid in changed), sorted(
        mid for mid in changed if not _touches(before[mid], "variety_tagger"))
    assert any(mid.startswith("variety_tagger.") for mid in changed)
