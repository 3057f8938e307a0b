"""Messages that do not make the user hunt: each against a fixture that produces it."""

from __future__ import annotations

import pytest

from conftest import SMALL
from stagewatch.cli import main

STAGE = """
pipeline: hub
context: business
stages:
  - id: scanner
    kind: source
    modality: tabular
    output: records
    serving: online
    volume_per_hour: 100
"""


def _err(capsys, argv: list[str], code: int = 2) -> str:
    assert main(argv) == code
    return capsys.readouterr().err


def test_an_unclosed_bracket_names_where_it_opened_and_where_the_parser_stopped(write, capsys):
    path = write("pipeline.yaml", """
        pipeline: hub
        stages: [
          {id: a, kind: source, modality: image, output: records, serving: online, volume_per_hour: 10},
          {id: b, kind: learned
        context: business
        owner: x
        """)
    err = _err(capsys, ["propose", str(path)])
    # PyYAML marks the problem at line 5 (the ':' after 'context') inside the flow mapping opened on line 4
    assert f"{path}:5:" in err and "stopped at line 5" in err and "starts on line 4" in err, err


def test_an_unclosed_quote_names_its_line(write, capsys):
    path = write("pipeline.yaml", 'pipeline: "hub\ncontext: business\nstages: []\n')
    err = _err(capsys, ["propose", str(path)])
    assert "starts on line 1" in err and "stopped at line 4" in err, err


@pytest.mark.parametrize("typo, key, line", [("volme_per_hour", "volume_per_hour", 10),
                                             ("upstreams", "upstream", 10)])
def test_a_typo_d_key_gets_did_you_mean(write, capsys, typo, key, line):
    path = write("pipeline.yaml", STAGE.replace("volume_per_hour: 100", f"volume_per_hour: 100\n    {typo}: 1"))
    err = _err(capsys, ["propose", str(path)])
    assert f"{path}:{line}: stages.0: unknown key '{typo}' (did you mean '{key}'?)" in err, err


def test_a_misspelt_choice_gets_did_you_mean(write, capsys):
    path = write("pipeline.yaml", STAGE.replace("kind: source", "kind: sorce"))
    err = _err(capsys, ["propose", str(path)])
    assert f"{path}:5:" in err and "'sorce' is not allowed (did you mean 'source'?)" in err, err


def test_every_problem_is_listed_with_its_line_up_to_a_limit(write, capsys):
    stages = "".join(f"  - id: s{i}\n    kind: source\n    modality: tabular\n    output: records\n    serving: "
                     f"online\n    volume_per_hour: 100\n    colour{i}: blue\n" for i in range(14))
    path = write("pipeline.yaml", "pipeline: hub\nstages:\n" + stages)
    err = _err(capsys, ["propose", str(path)])
    lines = [9 + 7 * i for i in range(14)]  # each colour key
    assert f"{path}:{lines[0]}: stages.0: unknown key 'colour0'" in err, err
    for i in range(1, 11):
        assert f"also {path}:{lines[i]}: stages.{i}: unknown key 'colour{i}'" in err, err
    assert "stages.11: unknown key" not in err and "and 3 more problems" in err, err


def test_a_file_of_many_unknown_keys_gives_a_short_message(write, capsys):
    keys = "".join(f"unknown_key_number_{i}: {'x' * 40}\n" for i in range(30_000))  # about 2 MB
    path = write("pipeline.yaml", "pipeline: hub\nstages: []\n" + keys)
    err = _err(capsys, ["propose", str(path)])
    assert len(err) < 5000, len(err)
    assert "30,002 unknown keys" not in err and "30,000 unknown keys" in err and "and 29,990 more" in err


def test_a_long_value_is_quoted_short(write, capsys):
    path = write("pipeline.yaml", STAGE.replace("kind: source", "kind: " + "z" * 100_000))
    err = _err(capsys, ["propose", str(path)])
    assert len(err) < 2000 and "(100,002 characters)" in err, err


def test_a_field_that_clashes_with_a_catalog_rule_points_to_the_user_s_line(write, capsys):
    path = write("pipeline.yaml", STAGE.replace("output: records", "output: value")
                 + "    outputs:\n      - {name: reading, type: numeric}\n      - {name: value, type: numeric}\n")
    err = _err(capsys, ["propose", str(path)])
    assert err.startswith(f"stagewatch: {path}:12: stage 'scanner': the output field 'value'"), err
    assert "output.yaml" in err and "in the catalog" in err


def test_propose_given_a_plan_says_which_file_it_expected(write, tmp_path, capsys):
    description = write("pipeline.yaml", SMALL)
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(description), "-o", str(plan)]) == 0
    err = _err(capsys, ["propose", str(plan)])
    assert "this is a plan, not a pipeline description: give the pipeline description" in err, err
    assert "the file the plan was proposed from" in err, err
    assert len(err.splitlines()) == 1
    (tmp_path / "plan.pipeline.yaml").write_text(SMALL)  # where the interview writes the description
    err = _err(capsys, ["propose", str(plan)])
    assert f"most likely {tmp_path / 'plan.pipeline.yaml'}" in err, err


def test_lint_given_a_description_says_which_file_it_expected(write, capsys):
    description = write("pipeline.yaml", SMALL)
    err = _err(capsys, ["lint", str(description)])
    assert "this is a pipeline description, not a plan" in err and f"stagewatch propose {description}" in err


def test_render_explain_and_export_given_a_description_say_which_file_they_expected(write, tmp_path, capsys):
    description = write("pipeline.yaml", SMALL)
    for args in (["render", str(description), "-o", str(tmp_path / "out")],
                 ["explain", str(description), "feed.input.amount_drift"],
                 ["export", str(description), "--to", "prometheus", "-o", str(tmp_path / "prom")]):
        err = _err(capsys, args)
        assert "this is a pipeline description, not a plan" in err, (args, err)
        assert f"stagewatch propose {description}" in err and len(err.splitlines()) == 1


def test_explain_suggests_the_closest_metric_ids(write, tmp_path, capsys):
    from stagewatch.demo import DEMO

    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(DEMO), "-o", str(plan)]) == 0
    err = _err(capsys, ["explain", str(plan), "load_cell.input.wieght_g_drift"])
    assert "did you mean load_cell.input.weight_g_drift," in err, err
    err = _err(capsys, ["explain", str(plan), "grade_asigner.input.weight_g_drift"])
    assert "did you mean grade_assigner.input.weight_g_drift," in err, err


def test_a_typo_d_required_key_is_reported_once(write, capsys):
    # 'servign' is 'serving' misspelt: one problem, on the typo's line, with the suggestion; no "required" line at
    # the stage's start for the key the typo stands for.
    path = write("pipeline.yaml", STAGE.replace("serving:", "servign:"))
    line = next(n for n, x in enumerate(path.read_text().splitlines(), 1) if "servign:" in x)
    err = _err(capsys, ["propose", str(path)])
    assert err.count("servign") == 1 and "required property" not in err, err
    assert f"{path}:{line}: stages.0: unknown key 'servign' (did you mean 'serving'?)" in err, err


def test_a_missing_required_key_no_typo_explains_is_still_reported(write, capsys):
    path = write("pipeline.yaml", "\n".join(x for x in STAGE.splitlines() if "serving:" not in x) + "\n    colour: blue\n")
    err = _err(capsys, ["propose", str(path)])
    assert "'serving' is a required property" in err and "unknown key 'colour'" in err, err


@pytest.mark.parametrize("given", ["plan", "json"])
def test_a_file_given_as_the_baseline_directory_says_a_directory_is_expected(write, tmp_path, capsys, given):
    """`--baseline plan.yaml` (or any file other than the baseline itself) is a mix-up of arguments, not a damaged
    baseline: the message says what goes there."""
    source, plan = write("p.yaml", SMALL), tmp_path / "plan.yaml"
    assert main(["propose", str(source), "-o", str(plan)]) == 0
    wrong = plan if given == "plan" else write("counts.json", '{"windows": []}')
    for argv in (["check", str(plan), "--baseline", str(wrong), "--data", "scorer=logs.parquet"],
                 ["propose", str(source), "--baseline", str(wrong), "-o", str(tmp_path / "again.yaml")]):
        err = _err(capsys, argv)
        assert f"{wrong}: a file where a baseline directory is expected" in err, err
        assert "a directory written by `stagewatch calibrate`" in err and "not valid JSON" not in err, err
    # The baseline file itself, damaged, is still told as damaged.
    damaged = tmp_path / "base" / "baseline.json"
    damaged.parent.mkdir()
    damaged.write_text('{"baseline": ')
    for target in (damaged.parent, damaged):
        assert "not valid JSON (truncated or edited?)" in _err(
            capsys, ["check", str(plan), "--baseline", str(target), "--data", "scorer=logs.parquet"])


def test_what_was_expected_stays_with_the_first_problem_of_several(write, capsys):
    """The keys a stage takes belong to the unknown key, the first problem; the lines after it are problems of
    their own and carry no expectation of the first."""
    path = write("pipeline.yaml", SMALL.replace("volume_per_hour: 1000\n    inputs", "volum_per_hour: 1000\n    inputs")
                 .replace("serving: online", "serving: onlin").replace("latency_slo_ms: 50", "latency_slo_ms: -5"))
    lines = _err(capsys, ["propose", str(path)]).strip().splitlines()
    assert len(lines) == 3, lines
    assert "unknown key 'volum_per_hour' (did you mean 'volume_per_hour'?) (expected: keys among" in lines[0]
    assert lines[0].endswith("upstream, volume_per_hour)"), lines[0]
    assert lines[1].startswith(f"  also {path}:") and "'onlin' is not allowed" in lines[1]
    assert lines[2].startswith(f"  also {path}:") and "-5 is less than the minimum" in lines[2]
    assert not any("(expected:" in line for line in lines[1:]), lines
