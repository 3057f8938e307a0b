"""Pipeline descriptions: defaults, and one clear message with file and line for each mistake."""

from __future__ import annotations

import pytest

from conftest import SMALL
from stagewatch.errors import StagewatchError
from stagewatch.spec import load_pipeline


def test_defaults_follow_the_context(write):
    pipeline = load_pipeline(str(write("p.yaml", SMALL)))
    assert pipeline.context == "business"
    assert [s.change_rate for s in pipeline.stages] == ["hours", "hours"]
    assert pipeline.false_alarms_per_week == 1
    consumer = load_pipeline(str(write("c.yaml", SMALL.replace("context: business", "context: consumer"))))
    assert {s.change_rate for s in consumer.stages} == {"days"}


def _error(write, text: str) -> StagewatchError:
    path = write("bad.yaml", text)
    with pytest.raises(StagewatchError) as info:
        load_pipeline(str(path))
    assert info.value.file == str(path)
    return info.value


def test_bad_enum_names_line_and_choices(write):
    err = _error(write, SMALL.replace("modality: tabular\n    output: score", "modality: tabulr\n    output: score"))
    assert err.line == 14
    assert "tabulr" in err.message and "tabular" in err.expected


def test_missing_required_key(write):
    err = _error(write, SMALL.replace("    volume_per_hour: 1000\n    latency_slo_ms: 50\n",
                                      "    latency_slo_ms: 50\n"))
    assert "volume_per_hour" in err.message and err.line == 12


def test_unknown_key_lists_the_allowed_ones(write):
    err = _error(write, SMALL.replace("    latency_slo_ms: 50\n", "    latency_slo: 50\n"))
    assert err.line == 19 and "latency_slo" in err.message and "latency_slo_ms" in err.expected


def test_duplicate_key_in_yaml(write):
    err = _error(write, SMALL.replace("    serving: online\n", "    serving: online\n    serving: batch\n"))
    assert "twice" in err.message and err.line == 18


def test_invalid_yaml_reports_its_line(write):
    err = _error(write, "pipeline: x\nstages:\n  - id: [unclosed\n")
    assert err.line is not None and "YAML" in err.message


def test_unknown_upstream_named(write):
    err = _error(write, SMALL.replace("upstream: [feed]", "upstream: [fed]"))
    assert "'fed'" in err.message and "feed" in err.expected and err.line == 16


def test_duplicate_stage_id(write):
    err = _error(write, SMALL.replace("id: scorer", "id: feed").replace("upstream: [feed]", "upstream: []"))
    assert "'feed' is used twice" in err.message and err.line == 12


def test_cycle_names_every_stage_on_it(write):
    text = SMALL.replace("    inputs:\n      - {name: amount", "    upstream: [scorer]\n    inputs:\n      - {name: amount")
    err = _error(write, text.replace("kind: source", "kind: rule-based", 1))  # a source takes no upstream
    assert "cycle" in err.message and "feed" in err.message and "scorer" in err.message


def test_delayed_labels_need_a_delay(write):
    err = _error(write, SMALL.replace("latency_slo_ms: 50", "latency_slo_ms: 50\n    labels: delayed"))
    assert "label_delay" in err.message and err.line == 20


def test_latency_slo_only_online(write):
    err = _error(write, SMALL.replace("serving: batch\n", "serving: batch\n    latency_slo_ms: 20\n", 1))
    assert "online" in err.message


def test_missing_file_and_not_a_mapping(write, tmp_path):
    with pytest.raises(StagewatchError, match="no such file"):
        load_pipeline(str(tmp_path / "nope.yaml"))
    err = _error(write, "- just\n- a list\n")
    assert "mapping" in err.message


def test_a_source_with_an_upstream_is_refused(write):
    text = SMALL.replace("    volume_per_hour: 1000\n    inputs:", "    volume_per_hour: 1000\n    upstream: [scorer]\n"
                         "    inputs:", 1)
    err = _error(write, text)
    assert "a source stage takes nothing from other stages" in err.message and err.line == 10


def test_run_every_only_on_a_batch_stage(write):
    text = SMALL.replace("    latency_slo_ms: 50\n", "    latency_slo_ms: 50\n    run_every: 1h\n")
    err = _error(write, text)
    assert "run_every is the period of a batch stage, and this one is online" in err.message
    assert text.strip().splitlines()[err.line - 1].strip() == "run_every: 1h"


def test_a_field_handed_over_keeps_its_type(write):
    text = SMALL.replace("    serving: batch\n    volume_per_hour: 1000\n    inputs:\n      - {name: amount, type: numeric, range: [0, 100]}\n",
                         "    serving: batch\n    volume_per_hour: 1000\n    outputs:\n      - {name: postcode, type: category}\n")
    text += "    inputs:\n      - {name: postcode, type: numeric}\n"
    err = _error(write, text)
    assert "input 'postcode' is numeric here but category in the outputs of 'feed' (line 11)" in err.message
    assert err.line == 21
