"""Question keys and the form of their answers, so that an answers file or a draft is checked whole before the
first question: every key against the keys the interview asks (with "did you mean"), every value with the same
checks the prompt applies.

The questions themselves (:mod:`stagewatch.interview`) take their kind, choices, check and conversion from the
forms here, so the prompt and the file cannot disagree.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any, Callable

from stagewatch import wording
from stagewatch.errors import StagewatchError
from stagewatch.interview_answers import (_count_range, _duration, _name_validator, _note, _number,
                                          _optional_number, _optional_positive, _parse_fields, _positive, _share,
                                          _stage_count)

KINDS = ["learned", "rule-based", "source"]
MODALITIES = ["tabular", "image", "video", "audio", "text", "events", "timeseries"]
OUTPUTS = ["class", "attribute", "score", "value", "ranking", "gate", "segments", "text", "records"]
SERVING = ["online", "batch", "device"]
CHANGE_RATES = ["minutes", "hours", "days", "months"]
LABELS = ["delayed", "immediate", "none"]
LAYERS = ("software", "input", "output")
REVIEW_CHOICES = ["accept all", "choose one by one", "later"]
REVISE_CHOICES = ["add a stage", "revise a stage", "finish"]


@dataclass
class Question:
    key: str
    text: str
    help: str
    kind: str = "text"  # text | select | checkbox | confirm
    choices: list[str] | None = None
    default: Any = None
    validate: Callable[[Any], str | None] | None = None
    convert: Callable[[str], Any] | None = None


@dataclass(frozen=True)
class Form:
    """The shape of one answer: the kind of prompt, its choices, its check and its conversion from text."""

    kind: str = "text"
    choices: tuple[str, ...] | None = None
    validate: Callable[[Any], str | None] | None = None
    convert: Callable[[Any], Any] | None = None

    def question(self, key: str, text: str, help: str, default: Any = None,
                 validate: Callable[[Any], str | None] | None = None,
                 choices: list[str] | None = None) -> Question:
        """A question of this form; ``validate`` and ``choices`` replace the form's where the flow knows more
        (stage ids already taken, the stages that can feed this one)."""
        return Question(key, text, help, self.kind, choices if choices is not None else
                        (list(self.choices) if self.choices else None), default, validate or self.validate,
                        self.convert)


PIPELINE = {
    "name": Form(validate=_name_validator(set())),
    "context": Form("select", ("business", "consumer")),
    "false_alarms_per_week": Form(validate=_positive, convert=_number),
    "owner": Form(),
    "stage_count": Form(validate=_count_range, convert=_stage_count),
}
STAGE = {
    "id": Form(validate=_name_validator(set())),  # the flow adds: not an id already taken
    "kind": Form("select", tuple(KINDS)),
    "modality": Form("select", tuple(MODALITIES)),
    "output": Form("select", tuple(OUTPUTS)),
    "upstream": Form("checkbox"),  # the flow adds the choices: stages entered before
    "volume_per_hour": Form(validate=_positive, convert=_number),
    "inputs": Form(convert=_parse_fields),
    "outputs": Form(convert=_parse_fields),
    "keep_defaults": Form("confirm"),
    "serving": Form("select", tuple(SERVING)),
    "run_every": Form(validate=_duration),
    "change_rate": Form("select", tuple(CHANGE_RATES)),
    "latency_slo_ms": Form(convert=_optional_number, validate=_optional_positive),
    "labels": Form("select", tuple(LABELS)),
    "label_delay": Form(validate=_duration),
    "labelled_share": Form(validate=_share, convert=_number),
}
REVIEW = Form("select", tuple(REVIEW_CHOICES))
PICK = Form("checkbox")  # metric ids: known once the plan is composed
NOTE = Form(validate=_note)
EDIT = {"window": Form(validate=_duration), "warn": Form(convert=_optional_number),
        "critical": Form(convert=_optional_number)}
CONFIRM = Form("confirm")
REVISE = Form("select", tuple(REVISE_CHOICES))
WHICH = Form("select")  # a stage id of the plan being revised: the flow adds the choices

_STAGE_ID = r"[a-z][a-z0-9_-]*"
_METRIC_ID = r"[a-z][a-z0-9_-]*\.(?:software|input|output)\.[^\s]+"
# (pattern of the part before the last dot, forms of the last part by name); the first pattern that fits decides.
_SHAPES: list[tuple[str, dict[str, Form]]] = [
    (r"pipeline", PIPELINE),
    (r"stages\.\d+", {**STAGE, "more": CONFIRM}),
    (r"revise\.\d+\.stage", STAGE),
    (r"revise\.\d+", {"which": WHICH}),
    (rf"review\.{_METRIC_ID}", {"note": NOTE}),
    (rf"review\.{_STAGE_ID}", {layer: REVIEW for layer in LAYERS}),
    (rf"review\.{_STAGE_ID}\.(?:software|input|output)", {"accepted": PICK, "edit": PICK}),
    (rf"edit\.{_METRIC_ID}", EDIT),
    (r"gaps", {"fix": CONFIRM, "drop_stale": CONFIRM}),
]
_WHOLE: list[tuple[str, Form]] = [(r"revise\.\d+", REVISE), (rf"gaps\.stale\.{_METRIC_ID}", CONFIRM)]


def form_of(key: str) -> Form | None:
    """The form of the answer a question key takes, or None for a key no question asks."""
    for pattern, form in _WHOLE:
        if re.fullmatch(pattern, key):
            return form
    head, _, last = key.rpartition(".")
    for pattern, forms in _SHAPES:
        if re.fullmatch(pattern, head) and last in forms:
            return forms[last]
    return None


def suggestion(key: str) -> str:
    """"did you mean" for a key no question asks: the nearest key of the same shape."""
    head, _, last = key.rpartition(".")
    for pattern, forms in _SHAPES:
        if forms and re.fullmatch(pattern, head):
            near = wording.closest(last, forms)
            if near:
                return f" (did you mean '{head}.{near[0]}'?)"
    numbers = re.findall(r"\d+", key) or ["0"]
    candidates = [f"pipeline.{k}" for k in PIPELINE] + [f"stages.{n}.{k}" for n in numbers for k in STAGE]
    candidates += ["gaps.fix", "gaps.drop_stale"] + [f"revise.{n}" for n in numbers]
    return wording.did_you_mean(key, candidates, n=1)


def answered_stages(answers: dict[str, Any]) -> set[int]:
    """The numbers N of the stages an answers file or a draft answers anything for (keys ``stages.N.*``)."""
    return {int(m.group(1)) for key in answers if (m := re.fullmatch(r"stages\.(\d+)\..+", str(key)))}


def check_known(question: Question, value: Any) -> Any:
    """An answer from a file or a draft, held to the form the prompt would have produced and to the prompt's own
    check; raises StagewatchError naming the key."""
    def bad(expected: str | None, problem: str = "is not allowed") -> StagewatchError:
        asked = f" ({question.text})" if question.text else ""
        return StagewatchError(f"answer to '{question.key}'{asked}: {wording.quote(value)} {problem}",
                               expected=expected)

    choices = [str(c) for c in question.choices or []]
    if question.kind == "select" and question.choices is None and not isinstance(value, str):
        raise bad("a name")
    if question.kind == "select" and question.choices is not None and value not in question.choices:
        raise bad("one of " + ", ".join(choices), "is not allowed" + wording.did_you_mean(str(value), choices))
    if question.kind == "confirm" and not isinstance(value, bool):
        raise bad("true or false")
    if question.kind == "checkbox" and not (isinstance(value, list) and all(
            isinstance(v, str) and (question.choices is None or v in question.choices) for v in value)):
        strays = [v for v in value if v not in choices] if isinstance(value, list) and question.choices else []
        hint = "".join(wording.did_you_mean(str(v), choices, n=1) for v in strays[:1])
        raise bad(("a list among " + ", ".join(choices)) if question.choices is not None else "a list",
                  "is not allowed" + (f": {wording.quote(strays[0])} is not a choice{hint}" if strays else ""))
    if question.kind == "text" and question.convert and (isinstance(value, str) or question.convert is _parse_fields):
        try:
            value = question.convert(value)
        except ValueError as exc:
            raise bad(question.help or None, f"is refused: {exc}") from None
    if question.validate is not None:
        problem = question.validate(value)
        if problem:
            raise bad(None, f"is refused: {problem}")
    return value


def check_answers(answers: dict[str, Any], path: str, lines: dict[str, int | None]) -> None:
    """Every key and every value of an answers file (or a draft) that can be checked before the plan exists;
    one error listing all problems, each with its line."""
    problems: list[tuple[int | None, str]] = []
    for key, value in answers.items():
        form = form_of(key)
        if form is None:
            problems.append((lines.get(key), f"no question has the key '{key}'{suggestion(key)}"))
            continue
        try:
            check_known(form.question(key, "", ""), value)
        except StagewatchError as exc:
            problems.append((lines.get(key), exc.described()))
    if problems:
        raise listed(problems, path)


def listed(problems: list[tuple[int | None, str]], path: str) -> StagewatchError:
    """One error for several problems in one file: the first, then the others, each with its line."""
    problems = sorted(problems, key=lambda p: p[0] or 0)
    (line, first), rest = problems[0], problems[1:]
    return StagewatchError(first + wording.problem_list([f"{path}:{n}: {m}" if n else f"{path}: {m}"
                                                         for n, m in rest]), file=path, line=line)
