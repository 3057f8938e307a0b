"""Lint findings on plans people edited, and the exit codes of `stagewatch lint`."""

from __future__ import annotations

import json

import yaml

from conftest import SMALL
from stagewatch.cli import main
from stagewatch.lint import lint_file
from stagewatch.plan import all_metrics
from stagewatch.propose import propose


def _plan(tmp_path, write):
    out = tmp_path / "plan.yaml"
    propose(str(write("p.yaml", SMALL)), str(out))
    return out


def _change(path, fn):
    data = yaml.safe_load(path.read_text())
    fn(data)
    path.write_text(yaml.safe_dump(data, sort_keys=False))


def _codes(path):
    return sorted({f.code for f in lint_file(str(path))})


def test_fresh_plan_is_clean(tmp_path, write):
    out = _plan(tmp_path, write)
    assert lint_file(str(out)) == []
    assert main(["lint", str(out)]) == 0


def test_missing_layer_and_uncovered_edge(tmp_path, write):
    out = _plan(tmp_path, write)

    def drop(data):
        scorer = data["stages"][1]
        scorer["metrics"] = [m for m in scorer["metrics"] if m["layer"] != "input"]

    _change(out, drop)
    findings = lint_file(str(out))
    codes = {f.code for f in findings}
    assert {"coverage-layer", "coverage-edge"} <= codes
    edge = next(f for f in findings if f.code == "coverage-edge")
    assert "feed -> scorer" in edge.message and "downstream" in edge.message and edge.line


def test_rejected_with_note_still_covers(tmp_path, write):
    out = _plan(tmp_path, write)

    def reject(data):
        for m in data["stages"][1]["metrics"]:
            if m["layer"] == "input":
                m["status"] = "rejected"
                m["note"] = "inputs are checked by the feed team's contract tests"

    _change(out, reject)
    assert _codes(out) == []

    def unnote(data):
        for m in data["stages"][1]["metrics"]:
            m.pop("note", None)

    _change(out, unnote)
    assert {"rejected-without-note", "coverage-layer", "coverage-edge"} <= set(_codes(out))


def test_threshold_order_window_and_duplicate_ids(tmp_path, write):
    out = _plan(tmp_path, write)

    def spoil(data):
        metrics = data["stages"][1]["metrics"]
        drift = next(m for m in metrics if m["id"] == "scorer.output.score_drift")
        drift["warn"], drift["critical"] = 0.3, 0.2
        drift["reference"] = "30m"
        metrics.append(dict(metrics[0]))

    _change(out, spoil)
    codes = set(_codes(out))
    assert {"threshold-order", "window", "duplicate-id"} <= codes


def test_schema_error_points_at_the_line(tmp_path, write):
    out = _plan(tmp_path, write)
    text = out.read_text().replace("status: proposed", "status: maybe", 1)
    out.write_text(text)
    findings = lint_file(str(out))
    assert findings[0].code == "schema" and "maybe" in findings[0].message
    assert text.splitlines()[findings[0].line - 1].strip().startswith("status: maybe")
    # Invalid input: exit 2, as render and export give for the same file (the README's exit-code table).
    assert main(["lint", str(out)]) == 2
    assert main(["render", str(out), "-o", str(tmp_path / "md")]) == 2


def test_json_format_and_exit_codes(tmp_path, write, capsys):
    out = _plan(tmp_path, write)
    _change(out, lambda d: d["stages"][0].update(metrics=[]))
    assert main(["lint", str(out), "--format", "json"]) == 1
    report = json.loads(capsys.readouterr().out)
    assert report["clean"] is False and all({"file", "line", "code", "message"} <= set(f) for f in report["findings"])
    assert main(["lint", str(tmp_path / "missing.yaml")]) == 2
    (tmp_path / "broken.yaml").write_text("plan_version: 1\nstages: [\n")
    assert main(["lint", str(tmp_path / "broken.yaml")]) == 2


def test_edited_threshold_below_noise_floor_is_found(tmp_path, write):
    out = _plan(tmp_path, write)
    propose(str(tmp_path / "p.yaml"), str(out))

    def tiny(data):
        for m in all_metrics(data):
            if m["id"] == "scorer.output.score_drift":
                m["critical"] = 0.0001
                m["warn"] = 0.00001

    _change(out, tiny)
    propose(str(tmp_path / "p.yaml"), str(out))  # re-sizing explains the edit and flags it
    assert "below-noise-floor" in _codes(out)


def test_a_page_at_burn_rate_1_or_less_is_found(tmp_path, write):
    # A 3-hour SLO period leaves the 2% page pair in the 5m shortest window at burn rate 0.02 x 180 / 5 = 0.72:
    # it would page while the SLO is met (REFERENCES.md, "SLO alerts for other periods").
    source = write("p.yaml", SMALL.replace("latency_slo_ms: 50", "latency_slo_ms: 50\n    slo_period: 3h"))
    out = tmp_path / "plan.yaml"
    propose(str(source), str(out))
    findings = [f for f in lint_file(str(out)) if f.code == "burn-rate"]
    assert findings and "0.72" in findings[0].message and findings[0].line
    slo = next(m for m in all_metrics(yaml.safe_load(out.read_text())) if m["statistic"] == "burn_rate")
    assert "too short for paging" in slo["review"]
    # The default 30-day period pages at 14.4 and 6: no finding.
    assert "burn-rate" not in _codes(_plan(tmp_path, write))


def test_a_missing_ml_test_score_check_is_named(tmp_path, write):
    # Breck et al., "The ML Test Score: A Rubric for ML Production Readiness and Technical Debt", IEEE Big Data
    # 2017, table IV: Monitor 4 "Models are not too stale", Monitor 7 "The model has not experienced a regression in
    # prediction quality on served data".
    out = _plan(tmp_path, write)

    def drop(data, checks):
        scorer = data["stages"][1]
        scorer["metrics"] = [m for m in scorer["metrics"] if not set(m.get("ml_test_score", [])) & checks]

    _change(out, lambda data: drop(data, {7}))
    [found] = [f for f in lint_file(str(out)) if f.code == "ml-test-score"]
    assert found.message == ("learned stage 'scorer' lacks ML Test Score monitoring check 7 (prediction quality has "
                             "not regressed)")
    _change(out, lambda data: drop(data, {4}))
    [found] = [f for f in lint_file(str(out)) if f.code == "ml-test-score"]
    assert found.message.endswith("monitoring checks 4 (models are not too stale), 7 (prediction quality has not "
                                  "regressed)")
