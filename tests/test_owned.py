"""Exports and renders own their files: stale ones are removed, hand edits are never overwritten without --force
(which keeps a .bak), and a bad target writes nothing."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

from conftest import demo_path
from stagewatch.cli import main
from stagewatch.errors import EXIT_USAGE
from stagewatch.owned import MANIFESTS


def _tree(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def _plan(tmp_path, text: str | None = None) -> tuple[Path, Path]:
    source = tmp_path / "pipeline.yaml"
    source.write_text(text or demo_path().read_text())
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(source), "-o", str(plan)]) == 0
    return source, plan


def test_a_hand_edited_export_is_kept_and_named_and_force_keeps_a_backup(tmp_path, capsys):
    _, plan = _plan(tmp_path)
    out = tmp_path / "export"
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out)]) == 0
    manifest = json.loads((out / MANIFESTS["export"]).read_text())
    assert set(manifest["files"]) == set(_tree(out)) - {MANIFESTS["export"]}
    # re-exporting an untouched export is quiet and changes nothing
    before = _tree(out)
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out)]) == 0
    assert _tree(out) == before
    config = out / "alertmanager.yml"
    edited = config.read_text().replace("http://", "https://pager.example/key-1234/", 1)
    config.write_text(edited)
    capsys.readouterr()
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out)]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert "alertmanager.yml" in err and "--force" in err
    assert config.read_text() == edited
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out), "--force"]) == 0
    assert (out / "alertmanager.yml.bak").read_text() == edited
    assert config.read_text() != edited


def test_a_hand_written_plan_md_is_not_overwritten_by_render(tmp_path, capsys):
    _, plan = _plan(tmp_path)
    docs = tmp_path / "docs"
    docs.mkdir()
    (docs / "plan.md").write_text("# Our own notes on the plan\n")
    assert main(["render", str(plan), "-o", str(docs)]) == EXIT_USAGE
    assert "plan.md" in capsys.readouterr().err
    assert (docs / "plan.md").read_text() == "# Our own notes on the plan\n"
    assert main(["render", str(plan), "-o", str(docs), "--force"]) == 0
    assert (docs / "plan.md.bak").read_text() == "# Our own notes on the plan\n"
    # rendered, then rendered again: ours, so no question asked; HTML beside it keeps its own record
    assert main(["render", str(plan), "-o", str(docs)]) == 0
    assert main(["render", str(plan), "-o", str(docs), "--format", "html"]) == 0
    assert (docs / "plan.md").exists() and (docs / "plan.html").exists()


def test_a_renamed_stage_leaves_no_rules_behind(tmp_path, capsys):
    source, plan = _plan(tmp_path)
    out = tmp_path / "export"
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out)]) == 0
    assert (out / "rules" / "frame_gate.rules.yml").exists()
    text = source.read_text().replace("  - id: frame_gate\n", "  - id: crop_gate\n    renamed_from: frame_gate\n")
    source.write_text(text.replace("upstream: [frame_gate]", "upstream: [crop_gate]"))
    assert main(["propose", str(source), "-o", str(plan)]) == 0
    assert main(["lint", str(plan)]) == 0
    capsys.readouterr()
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out)]) == 0
    said = capsys.readouterr().out
    assert "rules/frame_gate.rules.yml" in said and "removed" in said
    files = set(_tree(out))
    assert not any("frame_gate" in f for f in files), sorted(f for f in files if "frame_gate" in f)
    assert "rules/crop_gate.rules.yml" in files


def test_a_target_that_cannot_be_written_writes_nothing(tmp_path, capsys):
    _, plan = _plan(tmp_path)
    out = tmp_path / "export"
    (out / "rules" / "line_camera.rules.yml").mkdir(parents=True)  # a directory where a rule file goes
    (out / "notes.txt").write_text("ours\n")
    before = _tree(out)
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out)]) == EXIT_USAGE
    assert "directory" in capsys.readouterr().err
    assert _tree(out) == before and (out / "rules" / "line_camera.rules.yml").is_dir()


def test_export_refuses_thresholds_out_of_order_and_writes_nothing(tmp_path, capsys):
    import yaml

    _, plan = _plan(tmp_path)
    data = yaml.safe_load(plan.read_text())
    metric = next(m for s in data["stages"] for m in s["metrics"] if m["id"] == "load_cell.input.weight_g_drift")
    metric["warn"], metric["critical"] = 0.5, 0.25  # a reviewer's slip: warn above critical
    plan.write_text(yaml.safe_dump(data, sort_keys=False))
    out = tmp_path / "export"
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out)]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert "load_cell.input.weight_g_drift" in err and "nothing was written" in err
    assert not out.exists()
