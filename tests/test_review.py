"""The review loop: reviewer comments survive a re-propose, and a renamed stage or field takes its reviewed
metrics along."""

from __future__ import annotations

import yaml

from conftest import demo_path
from stagewatch import comments
from stagewatch.lint import lint_file
from stagewatch.plan import HEADER
from stagewatch.propose import propose


def _setup(tmp_path):
    source = tmp_path / "pipeline.yaml"
    source.write_text(demo_path().read_text())
    out = tmp_path / "plan.yaml"
    propose(str(source), str(out))
    return source, out


def _comment(text: str, before: str, comment: str) -> str:
    assert before in text
    indent = before[: len(before) - len(before.lstrip())]
    return text.replace(before, f"{indent}{comment}\n{before}", 1)


def _end_of_line(text: str, line_start: str, comment: str) -> str:
    i = text.index(line_start)
    j = text.index("\n", i)
    return text[:j] + "  " + comment + text[j:]


def test_reviewer_comments_survive_a_re_propose_and_an_untouched_plan_stays_byte_identical(tmp_path):
    source, out = _setup(tmp_path)
    text = out.read_text()
    text = _comment(text, "  - id: frame_gate.output.pass_rate\n", "# agreed with the line lead: page on this one")
    text = _comment(text, "- id: load_cell\n", "# the scale vendor owns this stage")
    text = _end_of_line(text, "  - id: blemish_scorer.output.score_drift", "# scores drift every spring")
    i = text.index("  - id: variety_tagger.output.quality")
    j = text.index("    critical:", i)
    text = text[:j] + "    # QA asked for a lower bar\n" + text[j:]
    out.write_text(text)
    # nothing changed: byte for byte the same file, comments included
    _, rep = propose(str(source), str(out))
    assert out.read_text() == text and rep.comments_kept == 4 and not rep.comments_moved
    # a volume change refreshes the numbers; every comment stays on its line
    source.write_text(source.read_text().replace("volume_per_hour: 2400", "volume_per_hour: 3600"))
    propose(str(source), str(out))
    after = out.read_text()
    assert after != text
    lines = after.splitlines()
    at = {line.strip(): k for k, line in enumerate(lines)}
    assert at["# agreed with the line lead: page on this one"] + 1 == at["- id: frame_gate.output.pass_rate"]
    assert at["# the scale vendor owns this stage"] + 1 == at["- id: load_cell"]
    assert "- id: blemish_scorer.output.score_drift  # scores drift every spring" in at
    quality = at["- id: variety_tagger.output.quality"]
    qa = at["# QA asked for a lower bar"]
    assert quality < qa and lines[qa + 1].strip().startswith("critical:")
    assert yaml.safe_load(after)["plan_version"] == 1 and lint_file(str(out)) == []


def test_a_comment_whose_line_is_gone_is_kept_at_the_end_and_reported(tmp_path):
    source, out = _setup(tmp_path)
    text = _comment(out.read_text(), "  - id: variety_tagger.output.confidence\n", "# why is this one here?")
    out.write_text(text)
    # the catalog no longer proposes it: a description without labels or confidence would do; simplest is to
    # take the metric away from the plan on disk as a reviewer deleting it would, then re-propose
    data = yaml.safe_load(text)
    found = comments.extract(text, HEADER)
    for stage in data["stages"]:
        stage["metrics"] = [m for m in stage["metrics"] if m["id"] != "variety_tagger.output.confidence"]
    restored, moved = comments.restore(HEADER + yaml.safe_dump(data, sort_keys=False), found)
    assert moved == ["# why is this one here?"]
    assert restored.rstrip().endswith(comments.ORPHANS + "\n# why is this one here?")
    assert yaml.safe_load(restored) == data  # comments only: the data is untouched


def test_a_renamed_stage_takes_every_edit_along_and_lint_stays_clean(tmp_path):
    source, out = _setup(tmp_path)
    data = yaml.safe_load(out.read_text())
    edits = {"frame_gate.output.pass_rate": {"warn": 0.05, "status": "accepted"},
             "frame_gate.software.saturation": {"status": "rejected", "note": "the gate runs on the line PLC"},
             "variety_tagger.input.from_frame_gate_contract": {"status": "accepted", "note": "owned by vision"}}
    for m in [m for s in data["stages"] for m in s["metrics"]]:
        m.update(edits.get(m["id"], {}))
    out.write_text(_comment(yaml.safe_dump(data, sort_keys=False), "  - id: frame_gate.output.pass_rate\n",
                            "# retuned in May"))
    renamed = source.read_text().replace("  - id: frame_gate\n", "  - id: crop_gate\n    renamed_from: frame_gate\n")
    source.write_text(renamed.replace("upstream: [frame_gate]", "upstream: [crop_gate]"))
    _, rep = propose(str(source), str(out))
    plan = yaml.safe_load(out.read_text())
    metrics = {m["id"]: m for s in plan["stages"] for m in s["metrics"]}
    assert not plan.get("retired_metrics") and not any("frame_gate." in mid for mid in metrics)
    new = {k.replace("frame_gate.", "crop_gate.").replace("from_frame_gate_", "from_crop_gate_"): v
           for k, v in edits.items()}
    for mid, changes in new.items():
        for key, value in changes.items():
            assert metrics[mid][key] == value, (mid, key)
    # the consumers' hand-off checks follow the new id too
    assert metrics["variety_tagger.input.from_crop_gate_contract"]["edge"]["from"] == "crop_gate"
    assert "frame_gate.output.pass_rate" in rep.renamed and not rep.added
    assert "# retuned in May\n  - id: crop_gate.output.pass_rate" in out.read_text()
    assert lint_file(str(out)) == []


def test_a_renamed_field_takes_its_checks_along(tmp_path):
    source, out = _setup(tmp_path)
    data = yaml.safe_load(out.read_text())
    for m in [m for s in data["stages"] for m in s["metrics"]]:
        if m["id"] == "load_cell.input.weight_g_drift":
            m["critical"] = 0.3
    out.write_text(yaml.safe_dump(data, sort_keys=False))
    text = source.read_text().replace("- {name: weight_g, type: numeric, range: [60, 450]}",
                                      "- {name: mass_g, type: numeric, range: [60, 450], renamed_from: weight_g}")
    source.write_text(text)
    propose(str(source), str(out))
    metrics = {m["id"]: m for s in yaml.safe_load(out.read_text())["stages"] for m in s["metrics"]}
    drift = metrics["load_cell.input.mass_g_drift"]
    assert drift["critical"] == 0.3 and drift["reads"]["column"] == "mass_g"
    assert not any("weight_g" in mid for mid in metrics)


def test_a_reviewers_round_trip_shows_a_diff_limited_to_what_changed(tmp_path):
    """Edit, comment, rename a stage, change a volume, re-propose, re-export: every edit and comment is kept and
    only the metrics of the two stages touched (and the hand-off checks on their edges) differ."""
    from stagewatch.cli import main
    from test_plan import _metric_blocks

    source, out = _setup(tmp_path)
    export = tmp_path / "export"
    text = _comment(out.read_text(), "  - id: grade_assigner.output.quality\n", "# QA reviews this weekly")
    i = text.index("  - id: load_cell.input.level_shift")
    j = text.index("    critical:", i)
    k = text.index("\n", j)
    text = text[:j] + "    critical: 0.8  # the scale drifts a little every morning" + text[k:]
    out.write_text(text)
    assert main(["export", str(out), "--to", "prometheus", "-o", str(export)]) == 0
    before = _metric_blocks(out.read_text())
    description = source.read_text().replace("  - id: frame_gate\n", "  - id: crop_gate\n    renamed_from: frame_gate\n")
    description = description.replace("upstream: [frame_gate]", "upstream: [crop_gate]")
    tagger = "    volume_per_hour: 2000\n    labels: delayed\n    label_delay: 2d\n"
    assert tagger in description
    source.write_text(description.replace(tagger, tagger.replace("2000", "3000")))  # variety_tagger
    propose(str(source), str(out))
    after_text = out.read_text()
    after = _metric_blocks(after_text)
    assert "# QA reviews this weekly\n  - id: grade_assigner.output.quality" in after_text
    assert "    critical: 0.8  # the scale drifts a little every morning" in after_text
    # what the reviewer touched: the renamed stage, the stage whose volume changed, the metric edited, and every
    # check that names one of those stages (hand-off checks and the checks they are folded into)
    touched = ("frame_gate", "crop_gate", "variety_tagger")
    same = [mid for mid, block in before.items() if not any(t in block for t in touched)
            and mid != "load_cell.input.level_shift"]
    assert same and all(before[mid] == after[mid] for mid in same), [m for m in same if before[m] != after[m]]
    assert lint_file(str(out)) == []
    assert main(["export", str(out), "--to", "prometheus", "-o", str(export)]) == 0
    assert not (export / "rules" / "frame_gate.rules.yml").exists()
    assert (export / "rules" / "crop_gate.rules.yml").exists()
