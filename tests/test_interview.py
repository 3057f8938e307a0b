"""The interview: real questionary prompts on prompt_toolkit pipe input, answers files, drafts, and tmux."""

from __future__ import annotations

import io
import shutil
import subprocess
import time
from pathlib import Path

import pytest
import yaml
from prompt_toolkit.data_structures import Size
from prompt_toolkit.input import create_pipe_input
from prompt_toolkit.output.vt100 import Vt100_Output

from conftest import stagewatch_command
from stagewatch import interview
from stagewatch.cli import main
from stagewatch.lint import lint_file

ENTER = "\r"
DOWN = "\x1b[B"
SPACE = " "
CLEAR = "\x15"  # Ctrl-U: clear the line before typing over a default
CTRL_C = "\x03"


class Keys:
    """Feeds each real prompt its own keystrokes and keeps what the prompts drew."""

    def __init__(self, script: list[str]):
        self.script = list(script)
        self.screen = io.StringIO()
        self.asked: list[str] = []

    def __call__(self, question):
        self.asked.append(question.key)
        assert self.script, f"the test ran out of keystrokes at {question.key}"
        keys = self.script.pop(0)
        with create_pipe_input() as pipe:
            pipe.send_text(keys)
            output = Vt100_Output(self.screen, lambda: Size(rows=50, columns=160), term="xterm")
            interview.IO.update(input=pipe, output=output)
            try:
                return ORIGINAL_PROMPT(question)
            finally:
                interview.IO.clear()


ORIGINAL_PROMPT = interview.prompt


@pytest.fixture
def keys(monkeypatch):
    def install(script):
        k = Keys(script)
        monkeypatch.setattr(interview, "prompt", k)
        monkeypatch.setattr(interview, "has_terminal", lambda: True)
        return k

    return install


def _learned_stage(name: str) -> list[str]:
    # id, kind (learned is the default after the first stage), modality, output, upstream, volume, output fields,
    # keep defaults
    return [CLEAR + name + ENTER, ENTER, ENTER, ENTER, ENTER, ENTER, ENTER, ENTER]


def _head(count: int) -> list[str]:
    return [CLEAR + "grading" + ENTER, ENTER, ENTER, ENTER, CLEAR + str(count) + ENTER]


def test_a_whole_interview_with_defaults_gives_a_lint_clean_plan(keys, tmp_path):
    script = _head(3)
    script += [CLEAR + "camera" + ENTER, ENTER, DOWN + ENTER, ENTER, ENTER, ENTER, ENTER]  # source of images, records
    script += _learned_stage("sizer")
    script += [CLEAR + "packer" + ENTER, DOWN + ENTER, ENTER, ENTER, ENTER, ENTER, ENTER, ENTER]  # rule-based gate
    # accept all: the layers of three stages (a camera source runs none of the team's software, so it has no
    # software layer), then two layers of the whole pipeline
    script += [ENTER] * 10
    k = keys(script)
    out = tmp_path / "plan.yaml"
    session = interview.Session(interactive=True, out=lambda _: None)
    lines = interview.run(session, str(out))
    assert not k.script, "every scripted keystroke was used"
    assert "wrote" in lines[0]
    assert lint_file(str(out)) == []
    plan = yaml.safe_load(out.read_text())
    assert [s["id"] for s in plan["stages"]] == ["camera", "sizer", "packer"]
    sizer = plan["stages"][1]
    assert sizer["kind"] == "learned" and sizer["labels"] == "delayed" and sizer["upstream"] == ["camera"]
    assert plan["stages"][0]["modality"] == "image" and plan["stages"][0]["output"] == "records"
    assert all(m["status"] == "accepted" for s in plan["stages"] for m in s["metrics"])
    assert all(m["status"] == "accepted" for m in plan["pipeline_metrics"])
    description = yaml.safe_load((tmp_path / "plan.pipeline.yaml").read_text())
    assert description["pipeline"] == "grading" and len(description["stages"]) == 3
    # A learned stage with the defaults accepted took 8 questions.
    assert len([q for q in k.asked if q.startswith("stages.1.")]) == 8


def test_validation_errors_are_shown_at_the_prompt(keys, tmp_path):
    script = _head(2)[:2]
    script += [CLEAR + "0" + ENTER + CLEAR + "-3" + ENTER + CLEAR + "lots" + ENTER + CLEAR + "2" + ENTER]
    script += [ENTER, CLEAR + "2" + ENTER]
    script += [CLEAR + "Bad Name" + ENTER + CLEAR + "pipeline" + ENTER + CLEAR + "feed" + ENTER, ENTER, ENTER, ENTER,
               CLEAR + "0" + ENTER + CLEAR + "fast" + ENTER + CLEAR + "500" + ENTER,
               "weight:kilos" + ENTER + CLEAR + "weight:numeric, site:category" + ENTER, ENTER, ENTER]
    script += [CLEAR + "feed" + ENTER + CLEAR + "model" + ENTER] + [ENTER] * 8
    script += [ENTER] * 7  # input and output of the source, three layers of the model, two of the pipeline
    keys(script)
    interview.run(interview.Session(interactive=True, out=lambda _: None), str(tmp_path / "plan.yaml"))
    # Each invalid answer was refused at the prompt (it stayed open for the next line), so only the valid ones
    # reached the plan; the tmux test shows a refusal message on a real screen.
    plan = yaml.safe_load((tmp_path / "plan.yaml").read_text())
    assert plan["false_alarms_per_week"] == 2 and plan["stages"][0]["volume_per_hour"] == 500
    assert [s["id"] for s in plan["stages"]] == ["feed", "model"]
    assert plan["stages"][0]["inputs"] == [{"name": "weight", "type": "numeric"}, {"name": "site", "type": "category"}]
    assert any(m["id"] == "feed.input.weight_drift" for m in plan["stages"][0]["metrics"])


def test_prompt_validators_give_the_reason():
    volume = interview.Question("v", "Items per hour", "", validate=interview._positive,
                                convert=interview._number)
    check = interview._questionary_validator(volume)
    assert check("0") == "must be a number above 0"
    assert check("lots") == "must be a number, such as 1200 or 0.5"
    assert check("12") is True
    ids = interview.Question("id", "Stage id", "", validate=interview._name_validator({"feed"}))
    assert interview._questionary_validator(ids)("feed") == "there is already a stage called 'feed'"
    fields = interview.Question("f", "Input fields", "", convert=interview._parse_fields)
    assert "type one of numeric" in interview._questionary_validator(fields)("weight:kilos")
    assert "listed twice" in interview._questionary_validator(fields)("a:flag, a:text")


def test_validators_directly():
    check = interview._name_validator({"a"})
    assert check("a") and check("A b") and check("pipeline") and check("b") is None
    assert interview._duration("3d") is None and interview._duration("3 days")
    assert interview._positive(0) and interview._positive("x") and interview._positive(2) is None


def test_ctrl_c_saves_a_draft_and_resume_loses_nothing(keys, tmp_path, capsys):
    out = tmp_path / "plan.yaml"
    first = _head(2) + [CLEAR + "feed" + ENTER, ENTER, CTRL_C]
    keys(first)
    assert main(["interview", "-o", str(out)]) == 130
    draft = tmp_path / "plan.draft.yaml"
    saved = yaml.safe_load(draft.read_text())["answers"]
    assert saved["pipeline.name"] == "grading" and saved["stages.0.id"] == "feed" and saved["stages.0.kind"] == "source"
    assert "--resume" in capsys.readouterr().err and not out.exists()
    # Resume: only the remaining questions are asked.
    k = keys([ENTER] * 6 + _learned_stage("model") + [ENTER, ENTER] + [ENTER] * 7)
    assert main(["interview", "--resume", str(draft)]) == 0
    assert k.asked[0] == "stages.0.modality"
    plan = yaml.safe_load(out.read_text())
    assert plan["pipeline"] == "grading" and [s["id"] for s in plan["stages"]] == ["feed", "model"]
    assert not draft.exists() and lint_file(str(out)) == []


def test_end_of_input_also_saves_a_draft(monkeypatch, tmp_path):
    def closed(question):
        with create_pipe_input() as pipe:
            pipe.close()
            interview.IO.update(input=pipe, output=Vt100_Output(io.StringIO(), lambda: Size(40, 120), term="xterm"))
            try:
                return ORIGINAL_PROMPT(question)
            finally:
                interview.IO.clear()

    monkeypatch.setattr(interview, "prompt", closed)
    monkeypatch.setattr(interview, "has_terminal", lambda: True)
    assert main(["interview", "-o", str(tmp_path / "p.yaml")]) == 130
    assert (tmp_path / "p.draft.yaml").exists()


def _answers(tmp_path, extra: str = "") -> Path:
    path = tmp_path / "answers.yaml"
    path.write_text("""
pipeline.name: hub
pipeline.stage_count: 2
stages.0.id: scanner
stages.0.kind: source
stages.0.modality: image
stages.0.output: records
stages.1.id: router
stages.1.modality: image
review.router.output: choose one by one
review.router.output.accepted: [router.output.class_mix, router.output.confidence, router.output.quality,
  router.output.non_finite_confidence]
review.router.output.from_scanner_x.note: unused
""".replace("review.router.output.from_scanner_x.note: unused\n", "") + extra)
    return path


def test_answers_file_replays_without_a_terminal(tmp_path):
    out = tmp_path / "plan.yaml"
    assert main(["interview", "--answers", str(_answers(tmp_path)), "-o", str(out)]) == 0
    plan = yaml.safe_load(out.read_text())
    statuses = {m["id"]: m["status"] for m in plan["stages"][1]["metrics"]}
    assert statuses["router.output.class_mix"] == "accepted"
    assert lint_file(str(out)) == []


def test_answers_file_with_unknown_keys_is_refused(tmp_path, capsys):
    path = _answers(tmp_path, "stages.7.colour: blue\n")
    assert main(["interview", "--answers", str(path), "-o", str(tmp_path / "plan.yaml")]) == 2
    assert "stages.7.colour" in capsys.readouterr().err and not (tmp_path / "plan.yaml").exists()


def test_no_terminal_and_no_answers_names_the_ways_out(tmp_path, capsys):
    assert main(["interview", "-o", str(tmp_path / "plan.yaml")]) == 2
    err = capsys.readouterr().err
    assert "--answers" in err and "propose" in err


def _add_chutes(tmp_path, modality: str, extra: str = "") -> Path:
    """Answers that reopen the plan, add a rule-based stage 'chutes' below 'router', and finish."""
    path = tmp_path / "revise.yaml"
    path.write_text(f"""
revise.0: add a stage
revise.0.stage.id: chutes
revise.0.stage.kind: rule-based
revise.0.stage.modality: {modality}
revise.0.stage.output: records
revise.0.stage.upstream: [router]
revise.1: finish
""" + extra)
    return path


def test_reopening_a_plan_adds_a_stage_and_keeps_decisions(tmp_path):
    out = tmp_path / "plan.yaml"
    assert main(["interview", "--answers", str(_answers(tmp_path)), "-o", str(out)]) == 0
    data = yaml.safe_load(out.read_text())
    data["stages"][0]["metrics"][0]["note"] = "checked by the scanner vendor"
    out.write_text(yaml.safe_dump(data, sort_keys=False))
    assert main(["interview", str(out), "--answers", str(_add_chutes(tmp_path, "tabular"))]) == 0
    plan = yaml.safe_load(out.read_text())
    assert [s["id"] for s in plan["stages"]] == ["scanner", "router", "chutes"]
    assert plan["stages"][0]["metrics"][0]["note"] == "checked by the scanner vendor"
    statuses = {m["id"]: m["status"] for m in plan["stages"][1]["metrics"]}
    assert statuses["router.output.class_mix"] == "accepted"
    # the mix router sends to chutes is its class mix: one check, serving the hand-off's upstream side too
    mix = next(m for m in plan["stages"][1]["metrics"] if m["id"] == "router.output.class_mix")
    assert {"metric": "router.output.to_chutes_mix", "edge": {"from": "router", "to": "chutes", "side": "upstream"}} \
        in mix["serves"]
    assert lint_file(str(out)) == []


# --- end to end in a real terminal --------------------------------------------------------------------------

def _tmux(*args: str) -> str:
    return subprocess.run(["tmux", *args], capture_output=True, text=True, timeout=20).stdout


def _until(session: str, text: str, seconds: float = 30) -> str:
    deadline = time.monotonic() + seconds
    screen = ""
    while time.monotonic() < deadline:
        screen = _tmux("capture-pane", "-p", "-t", session)
        if text in screen:
            return screen
        time.sleep(0.2)
    raise AssertionError(f"'{text}' never appeared:\n{screen}")


def test_interview_in_tmux_with_default_answers(tmp_path):
    assert shutil.which("tmux"), "tmux is not installed; `make test` installs it (.ci/install-tools)"
    session = f"sw{int(time.time() * 1000) % 10**8}"
    command = f"cd {tmp_path} && {stagewatch_command()} interview -o plan.yaml; echo EXIT=$?; sleep 30"
    _tmux("new-session", "-d", "-s", session, "-x", "160", "-y", "50", command)
    try:
        # An invalid budget is refused at the prompt, with the reason on screen.
        _until(session, "Pipeline name")
        _tmux("send-keys", "-t", session, "Enter")
        _until(session, "Who produces the data")
        _tmux("send-keys", "-t", session, "Enter")
        _until(session, "False pages per week")
        _tmux("send-keys", "-t", session, "BSpace", "0", "Enter")
        assert "must be a number above 0" in _until(session, "must be a number above 0")
        _tmux("send-keys", "-t", session, "BSpace", "1", "Enter")
        deadline = time.monotonic() + 180
        screen = ""
        previous = None
        while time.monotonic() < deadline:
            time.sleep(0.4)
            screen = _tmux("capture-pane", "-p", "-t", session)
            if "EXIT=" in screen:
                break
            if screen == previous and "?" in screen:  # the screen settled on a prompt: accept its default
                _tmux("send-keys", "-t", session, "Enter")
                previous = None
                continue
            previous = screen
        assert "EXIT=0" in screen, screen
        result = subprocess.run([stagewatch_command(), "lint", str(tmp_path / "plan.yaml")], capture_output=True,
                                text=True, timeout=120)
        assert result.returncode == 0, result.stdout
        plan = yaml.safe_load((tmp_path / "plan.yaml").read_text())
        assert len(plan["stages"]) == 5
    finally:
        _tmux("kill-session", "-t", session)


def test_a_second_interview_keeps_the_earlier_description(tmp_path):
    out = tmp_path / "plan.yaml"
    assert main(["interview", "--answers", str(_answers(tmp_path)), "-o", str(out)]) == 0
    description = tmp_path / "plan.pipeline.yaml"
    description.write_text(description.read_text() + "# my own comment\n")
    hand_edited = description.read_text()
    assert main(["interview", "--answers", str(_answers(tmp_path)), "-o", str(out)]) == 0
    assert (tmp_path / "plan.pipeline.previous.yaml").read_text() == hand_edited


def test_a_metric_that_no_longer_applies_can_be_kept_as_manual(tmp_path):
    out = tmp_path / "plan.yaml"
    assert main(["interview", "--answers", str(_answers(tmp_path)), "-o", str(out)]) == 0
    # chutes packs 1,000 items an hour into 400 lots: items no longer flow one to one, so the end-to-end drop share
    # no longer applies (an aggregating stage gets a yield check instead)
    revise = _add_chutes(tmp_path, "image", "revise.0.stage.volume_per_hour: 400\n"
                         "gaps.stale.pipeline.output.end_to_end_drop: false\n")
    assert main(["interview", str(out), "--answers", str(revise)]) == 0
    plan = yaml.safe_load(out.read_text())
    assert any(m["id"] == "chutes.output.items_per_output" for m in plan["stages"][2]["metrics"])
    kept = next(m for m in plan["pipeline_metrics"] if m["id"] == "pipeline.output.end_to_end_drop")
    assert kept["source"] == "manual" and kept["status"] == "accepted"
    assert lint_file(str(out)) == []
