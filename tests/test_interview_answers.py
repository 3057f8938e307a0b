"""The interview never writes a plan that lint rejects: answers files checked whole before the first question, the
README's inputs syntax in a file, thresholds checked at the prompt, the closing fixes, and a property test over
generated answer files (hypothesis draws every answer a person could give at each prompt)."""

from __future__ import annotations

from pathlib import Path

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stagewatch import commands_interview, interview
from stagewatch.cli import main
from stagewatch.errors import StagewatchError
from stagewatch.interview_keys import Question, check_known
from stagewatch.lint import lint_file
from stagewatch.plan import load_plan

HEAD = """
pipeline.name: hub
pipeline.stage_count: 2
stages.0.id: scanner
stages.0.kind: source
stages.0.modality: tabular
stages.1.id: router
"""


def _file(tmp_path: Path, text: str, name: str = "answers.yaml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


@pytest.fixture
def no_question(monkeypatch):
    """Fails the test if the interview starts: the answers must be refused before the first question."""
    def started(*args, **kwargs):
        raise AssertionError("the interview started before the answers were refused")

    monkeypatch.setattr(interview, "run", started)


@pytest.mark.parametrize("line, key, hint", [
    ("stages.1.volme_per_hour: 100", "stages.1.volme_per_hour", "did you mean 'stages.1.volume_per_hour'"),
    ("stages.0.upstreams: [x]", "stages.0.upstreams", "did you mean 'stages.0.upstream'"),
    ("pipline.name: hub", "pipline.name", "did you mean 'pipeline.name'"),
    ("review.router.outptu: accept all", "review.router.outptu", "did you mean 'review.router.output'"),
    ("edit.router.output.quality.critcal: 0.2", "edit.router.output.quality.critcal",
     "did you mean 'edit.router.output.quality.critical'"),
    ("review.router.output: accept al", "review.router.output", "did you mean 'accept all'"),
    ("stages.1.kind: lerned", "stages.1.kind", "did you mean 'learned'"),
    ("stages.1.volume_per_hour: -5", "stages.1.volume_per_hour", "must be a number above 0"),
    ("stages.1.labelled_share: 2", "stages.1.labelled_share", "at most 1"),
    ("stages.1.run_every: daily", "stages.1.run_every", "a duration such as"),
    ("stages.1.keep_defaults: maybe", "stages.1.keep_defaults", "true or false"),
    ("stages.0.inputs: weight:kilos", "stages.0.inputs", "type one of numeric"),
    ("stages.2.id: Router", "stages.2.id", "lower case"),
    ("edit.router.output.quality.warn: lots", "edit.router.output.quality.warn", "must be a number"),
    ("review.router.output.class_mix.note: ''", "review.router.output.class_mix.note", "needs a reason"),
])
def test_every_invalid_answer_is_refused_before_any_question(tmp_path, capsys, no_question, line, key, hint):
    path = _file(tmp_path, HEAD + line + "\n")
    assert main(["interview", "--answers", str(path), "-o", str(tmp_path / "plan.yaml")]) == 2
    err = capsys.readouterr().err
    assert f"{path}:{len(HEAD.splitlines()) + 1}:" in err and f"'{key}'" in err and hint in err, err
    assert not (tmp_path / "plan.yaml").exists()


def test_all_problems_of_an_answers_file_are_listed_with_their_lines(tmp_path, capsys, no_question):
    path = _file(tmp_path, HEAD + "stages.1.volme_per_hour: 100\nstages.1.kind: lerned\nreview.router.output: accept al\n")
    assert main(["interview", "--answers", str(path), "-o", str(tmp_path / "plan.yaml")]) == 2
    err = capsys.readouterr().err
    first = len(HEAD.splitlines()) + 1
    for n, key in enumerate(["stages.1.volme_per_hour", "stages.1.kind", "review.router.output"]):
        assert f"{path}:{first + n}:" in err and key in err, err


def test_a_draft_is_checked_before_the_first_question(tmp_path, capsys, no_question, monkeypatch):
    monkeypatch.setattr(interview, "has_terminal", lambda: True)
    draft = _file(tmp_path, "draft_version: 1\noutput: plan.yaml\nanswers:\n  pipeline.name: hub\n"
                  "  stages.0.kind: sorce\n", "plan.draft.yaml")
    assert main(["interview", "--resume", str(draft)]) == 2
    err = capsys.readouterr().err
    assert f"{draft}:5:" in err and "did you mean 'source'" in err


@pytest.mark.parametrize("inputs", [
    "weight_g:numeric, site:category",  # the README's form, as typed at the prompt
    '"weight_g:numeric, site:category"',
    "[weight_g:numeric, site:category]",
    "{weight_g: numeric, site: category}",
    "[{name: weight_g, type: numeric}, {name: site, type: category}]",
])
def test_the_readme_inputs_syntax_works_in_an_answers_file(tmp_path, inputs):
    path = _file(tmp_path, HEAD + f"stages.0.inputs: {inputs}\n")
    out = tmp_path / "plan.yaml"
    assert main(["interview", "--answers", str(path), "-o", str(out)]) == 0
    plan = yaml.safe_load(out.read_text())
    assert plan["stages"][0]["inputs"] == [{"name": "weight_g", "type": "numeric"},
                                           {"name": "site", "type": "category"}]
    assert lint_file(str(out)) == []


def test_thresholds_are_checked_as_lint_checks_them(tmp_path, capsys):
    edit = ("review.router.output: choose one by one\nreview.router.output.edit: [router.output.class_mix]\n"
            "edit.router.output.class_mix.warn: {warn}\nedit.router.output.class_mix.critical: {critical}\n")
    out = tmp_path / "plan.yaml"
    for warn, critical, said in [(0.5, 0.4, "warn 0.5 must come before critical 0.4 for direction 'above'"),
                                 ("''", "''", "can never alert"),
                                 (0.1, -0.3, "a size of change"),
                                 (0.001, 0.002, "below the noise floor")]:
        path = _file(tmp_path, HEAD + edit.format(warn=warn, critical=critical))
        assert main(["interview", "--answers", str(path), "-o", str(out)]) == 2
        err = capsys.readouterr().err
        assert "edit.router.output.class_mix.critical" in err and said in err, err
        assert not out.exists()
    path = _file(tmp_path, HEAD + edit.format(warn=0.3, critical=0.6))
    assert main(["interview", "--answers", str(path), "-o", str(out)]) == 0
    mix = next(m for m in yaml.safe_load(out.read_text())["stages"][1]["metrics"] if m["id"] == "router.output.class_mix")
    assert (mix["warn"], mix["critical"]) == (0.3, 0.6) and lint_file(str(out)) == []


def test_the_new_questions_reach_the_description(tmp_path):
    path = _file(tmp_path, HEAD + "stages.1.serving: batch\nstages.1.run_every: 6h\nstages.1.labels: delayed\n"
                 "stages.1.labelled_share: 0.05\nstages.1.outputs: route:category, eta_min:numeric\n")
    out = tmp_path / "plan.yaml"
    assert main(["interview", "--answers", str(path), "-o", str(out)]) == 0
    router = yaml.safe_load((tmp_path / "plan.pipeline.yaml").read_text())["stages"][1]
    assert router["run_every"] == "6h" and router["labelled_share"] == 0.05 and router["serving"] == "batch"
    assert router["outputs"] == [{"name": "route", "type": "category"}, {"name": "eta_min", "type": "numeric"}]
    plan = yaml.safe_load(out.read_text())
    assert any(m["id"] == "router.output.eta_min_drift" for m in plan["stages"][1]["metrics"])
    assert lint_file(str(out)) == []


def test_an_output_field_the_catalog_already_uses_is_refused_at_the_prompt():
    from stagewatch.interview_stage import _outputs_fit

    head = {"pipeline": "hub", "context": "business"}
    stage = {"id": "meter", "kind": "learned", "modality": "tabular", "output": "value", "upstream": [],
             "volume_per_hour": 100}
    check = _outputs_fit(head, [], stage)
    assert "field 'value'" in check([{"name": "value", "type": "numeric"}])
    assert check([{"name": "reading", "type": "numeric"}]) is None


def test_resume_shows_the_answers_so_far(tmp_path):
    said: list[str] = []
    session = interview.Session({"pipeline.name": "hub", "stages.0.inputs": [{"name": "w", "type": "numeric"}]},
                                out=said.append)
    session.recap()
    assert said == ["answers so far (2):", "  pipeline.name: hub", "  stages.0.inputs: w:numeric"]


def test_a_known_answer_is_held_to_the_prompt_s_own_check():
    question = Question("stages.0.volume_per_hour", "Items per hour", "", validate=interview._positive,
                        convert=interview._number)
    assert check_known(question, "1200") == 1200
    with pytest.raises(StagewatchError, match="must be a number above 0"):
        check_known(question, 0)


# --- the property: no interview path writes a plan that lint rejects -------------------------------------------

TEXT = {
    "name": st.sampled_from(["hub", "parcel-hub", "Bad Name"]),
    "id": st.sampled_from(["scanner", "router", "chutes", "gate_2", "pipeline", "X"]),
    "owner": st.sampled_from(["ml-team", ""]),
    "false_alarms_per_week": st.sampled_from(["1", "0.2", "5", "0", "many"]),
    "stage_count": st.sampled_from(["1", "2", "3", "x"]),
    "volume_per_hour": st.sampled_from(["40", "1000", "20000", "0.5", "-1"]),
    "inputs": st.sampled_from(["", "weight_g:numeric", "weight_g:numeric, site:category", "w:kilos"]),
    "outputs": st.sampled_from(["", "route:category", "eta_min:numeric", "value:numeric", "score:numeric"]),
    "run_every": st.sampled_from(["15m", "1h", "1d", "7d", "daily"]),
    "latency_slo_ms": st.sampled_from(["", "150", "-3"]),
    "label_delay": st.sampled_from(["1h", "3d", "soon"]),
    "labelled_share": st.sampled_from(["1", "0.05", "0.5", "0", "2"]),
    "note": st.sampled_from(["covered by the vendor's own checks", ""]),
    "window": st.sampled_from(["5m", "1h", "6h", "1d", "90d", "never"]),
    "warn": st.sampled_from(["", "0", "0.05", "0.3", "2", "-1"]),
    "critical": st.sampled_from(["", "0.01", "0.2", "0.5", "5", "-2"]),
}
FALLBACK = ["", "1", "10", "100", "1000", "100000000000"]


class Drawing:
    """A person at the prompt: draws an answer; a refused one is typed again, as questionary asks again."""

    def __init__(self, data):
        self.data = data

    def __call__(self, question):
        if question.kind == "select":
            return self.data.draw(st.sampled_from(question.choices))
        if question.kind == "confirm":
            return self.data.draw(st.booleans())
        if question.kind == "checkbox":
            picked = self.data.draw(st.lists(st.sampled_from(question.choices), unique=True)) if question.choices \
                else []
            return [c for c in question.choices or [] if c in picked]
        last = question.key.rpartition(".")[2]
        tries = [self.data.draw(TEXT[last]) for _ in range(3)] if last in TEXT else []
        for text in [*tries, str(question.default if question.default is not None else ""), *FALLBACK]:
            check = interview._questionary_validator(question)
            if check is None or check(text) is True:
                return question.convert(text) if question.convert else text
        raise AssertionError(f"no answer passes the check of {question.key}")


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                  HealthCheck.too_slow])
@given(data=st.data())
def test_no_interview_path_writes_a_plan_that_lint_rejects(tmp_path_factory, monkeypatch, data):
    """Answers drawn at every prompt make an answers file; the interview replays it without a terminal. Whatever
    the answers, the plan written passes lint and loads, or nothing is written and the reason is given."""
    tmp = tmp_path_factory.mktemp("drawn")
    monkeypatch.setattr(interview, "prompt", Drawing(data))
    drawn = interview.Session(out=lambda _: None)
    try:
        interview.run(drawn, str(tmp / "drawn.yaml"))
    except StagewatchError:
        assert not (tmp / "drawn.yaml").exists()
    else:
        assert lint_file(str(tmp / "drawn.yaml")) == []
    answers = tmp / "answers.yaml"
    answers.write_text(yaml.safe_dump(drawn.answers, sort_keys=False))
    assert commands_interview.load_answers(str(answers))["answers"] == drawn.answers  # checked before any question
    out = tmp / "plan.yaml"
    code = main(["interview", "--answers", str(answers), "-o", str(out)])
    assert code in (0, 2)
    if code == 0:
        assert lint_file(str(out)) == []
        load_plan(str(out))
        assert out.read_text() == (tmp / "drawn.yaml").read_text()
    else:
        assert not out.exists() and not (tmp / "drawn.yaml").exists()


def test_the_closing_question_offers_the_fix_for_the_finding_it_names(tmp_path, capsys):
    out = tmp_path / "plan.yaml"
    assert main(["interview", "--answers", str(_file(tmp_path, HEAD)), "-o", str(out)]) == 0
    proposed = yaml.safe_load(out.read_text())
    mix = next(m for m in proposed["stages"][1]["metrics"] if m["id"] == "router.output.class_mix")
    plan = yaml.safe_load(out.read_text())
    edited = next(m for m in plan["stages"][1]["metrics"] if m["id"] == "router.output.class_mix")
    edited["warn"], edited["critical"] = mix["critical"], mix["warn"]  # a reviewer swapped them by hand
    out.write_text(yaml.safe_dump(plan, sort_keys=False))
    assert [f.code for f in lint_file(str(out))] == ["threshold-order"]
    capsys.readouterr()
    finish = _file(tmp_path, "revise.0: finish\n", "finish.yaml")
    assert main(["interview", str(out), "--answers", str(finish)]) == 0
    said = capsys.readouterr().out
    assert "[threshold-order] metric 'router.output.class_mix'" in said
    assert "fix: restore the proposed window and thresholds of router.output.class_mix" in said
    fixed = next(m for m in yaml.safe_load(out.read_text())["stages"][1]["metrics"] if m["id"] == "router.output.class_mix")
    assert (fixed["warn"], fixed["critical"]) == (mix["warn"], mix["critical"]) and lint_file(str(out)) == []
    # Declining the fix writes nothing: the plan on disk stays as the reviewer left it.
    out.write_text(yaml.safe_dump(plan, sort_keys=False))
    before = out.read_text()
    decline = _file(tmp_path, "revise.0: finish\ngaps.fix: false\n", "decline.yaml")
    assert main(["interview", str(out), "--answers", str(decline)]) == 2
    assert "not written" in capsys.readouterr().err and out.read_text() == before


# --- the stages an answers file makes: the ones it answers, never made-up ones ------------------------------------

TWO_STAGES = """
pipeline.name: hub
stages.0.id: scanner
stages.0.kind: source
stages.1.id: router
"""


@pytest.mark.parametrize("count", ["", "pipeline.stage_count: 2\n", "pipeline.stage_count: 0\n"])
def test_an_answers_file_makes_exactly_the_stages_it_answers(tmp_path, count):
    """Without a stage count the count follows from the highest stage answered; with 0 (one by one) no stage is
    added past the last one answered (the default "add another" used to add stages until the process was
    killed)."""
    out = tmp_path / "plan.yaml"
    assert main(["interview", "--answers", str(_file(tmp_path, TWO_STAGES + count)), "-o", str(out)]) == 0
    description = yaml.safe_load((tmp_path / "plan.pipeline.yaml").read_text())
    assert [st["id"] for st in description["stages"]] == ["scanner", "router"]
    assert lint_file(str(out)) == []


@pytest.mark.parametrize("text, line, said", [
    (TWO_STAGES + "pipeline.stage_count: 5\n", 6,
     "pipeline.stage_count is 5, but nothing is answered for stages.2, stages.3, stages.4"),
    (TWO_STAGES.replace("stages.1.", "stages.2.").replace("stages.0.", "stages.1."), None,
     "the answers give stages up to stages.2, but nothing for stages.0"),
    ("pipeline.name: hub\n", None, "the answers give no stage"),
])
def test_stages_an_answers_file_does_not_answer_are_refused(tmp_path, capsys, text, line, said):
    path = _file(tmp_path, text)
    out = tmp_path / "plan.yaml"
    assert main(["interview", "--answers", str(path), "-o", str(out)]) == 2
    err = capsys.readouterr().err
    assert said in err and "stages are numbered from 0" in err and "(expected: " in err, err
    assert (f"{path}:{line}:" if line else f"{path}: ") in err, err
    assert not out.exists() and not (tmp_path / "plan.pipeline.yaml").exists()
