"""`interview`: from a blank page to a reviewed plan in one sitting, in the terminal.

Questions are data (:class:`Question`); :func:`prompt` is the one function that talks to the terminal (through
questionary), and tests or ``--answers`` replace it. Every answer is stored under a stable key
(``pipeline.name``, ``stages.2.kind``, ``review.grader.input``...), so a draft saved on Ctrl-C, an answers file and
a resumed session are the same thing: answers looked up before anything is asked.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any, Callable, Sequence

from stagewatch import spec, wording, yamlio
from stagewatch.errors import StagewatchError
from stagewatch.graph import PipelineGraph
from stagewatch.plan import all_metrics, compose, dump, load_plan
from stagewatch.safewrite import Snapshot, resolve_target
from stagewatch.interview_answers import (FIELD_TYPES, _duration, _fields_text, _name_validator, _number,  # noqa: F401
                                          _optional_number, _parse_fields, _positive)
from stagewatch.interview_keys import (CHANGE_RATES, KINDS, LABELS, LAYERS, MODALITIES, OUTPUTS,  # noqa: F401
                                       CONFIRM, PIPELINE, REVISE, SERVING, STAGE, WHICH, Question, answered_stages,
                                       check_known, form_of, listed)
from stagewatch.interview_stage import STRUCTURED, ask_stage  # noqa: F401

Answers = dict[str, Any]


class Interrupted(Exception):
    """Ctrl-C or end of input during a prompt."""


# The one place that talks to the terminal. Tests set IO to prompt_toolkit pipe input and a dummy output.
IO: dict[str, Any] = {}


def prompt(question: Question) -> Any:
    import questionary

    validate = _questionary_validator(question)
    if question.kind == "select":
        q = questionary.select(question.text, choices=question.choices or [], default=question.default, **IO)
    elif question.kind == "checkbox":
        choices = [questionary.Choice(c, checked=c in (question.default or [])) for c in question.choices or []]
        q = questionary.checkbox(question.text, choices=choices, validate=validate or (lambda _: True), **IO)
    elif question.kind == "confirm":
        q = questionary.confirm(question.text, default=bool(question.default), **IO)
    else:
        default = "" if question.default is None else str(question.default)
        q = questionary.text(question.text, default=default, validate=validate or (lambda _: True), **IO)
    try:
        value = q.unsafe_ask()
    except (KeyboardInterrupt, EOFError):
        raise Interrupted from None
    if question.kind == "text" and question.convert:
        value = question.convert(value)
    return value


def _questionary_validator(question: Question) -> Callable[[Any], bool | str] | None:
    if not question.validate and not (question.kind == "text" and question.convert):
        return None

    rule = question.validate

    def check(value: Any) -> bool | str:
        if question.kind == "text" and question.convert:
            try:
                value = question.convert(value)
            except ValueError as exc:
                return str(exc)
        problem = rule(value) if rule else None
        return True if problem is None else problem

    return check


def has_terminal() -> bool:
    return sys.stdin.isatty() and sys.stdout.isatty()


class Session:
    """Asks questions in order, taking answers already known (draft, answers file) instead of prompting.

    Without a terminal (``interactive=False``) a refused answer does not stop the interview: the problem is kept,
    the question takes its default, and :meth:`finish` reports every problem at once, before anything is written.
    At a terminal, a refused answer from a draft is said and asked again.
    """

    def __init__(self, known: Answers | None = None, interactive: bool = True, out: Callable[[str], None] = print,
                 source: str = "<answers>", lines: dict[str, int | None] | None = None):
        self.known = dict(known or {})
        self.answers: Answers = {}
        self.interactive = interactive
        self.out = out
        self.asked: set[str] = set()
        self.source = source
        self.lines = lines or {}
        self.problems: list[tuple[int | None, str]] = []

    def ask(self, question: Question) -> Any:
        self.asked.add(question.key)
        if question.key in self.known:
            try:
                value = check_known(question, self.known[question.key])
            except StagewatchError as exc:
                if self.interactive:
                    self.out(f"  the saved answer is refused: {exc}; asking again")
                    return self._prompt(question)
                self.problems.append((self.lines.get(question.key), str(exc)))
                return self._default(question)
        elif not self.interactive:
            value = self._default(question)
        else:
            return self._prompt(question)
        self.answers[question.key] = value
        return value

    def _prompt(self, question: Question) -> Any:
        self.out(f"  why: {question.help}" if question.help else "")
        value = prompt(question)
        self.answers[question.key] = value
        return value

    def _default(self, question: Question) -> Any:
        if question.default is None and question.kind == "text":
            self.problems.append((self.lines.get(question.key), f"no answer for '{question.key}' ({question.text}) "
                                  "and no default"))
            raise listed(self.problems, self.source)
        self.answers[question.key] = question.default
        return question.default

    def unused(self) -> list[str]:
        return sorted(k for k in self.known if k not in self.asked)

    def finish(self) -> None:
        """Every refused answer and every key no question asked, in one error; nothing is written then."""
        problems = list(self.problems)
        for key in self.unused():
            hint = wording.did_you_mean(key, self.asked, n=1) if form_of(key) else ""
            problems.append((self.lines.get(key), f"no question asked '{key}': the answers before it lead past it"
                             + hint if form_of(key) else f"no question has the key '{key}'"))
        if problems:
            raise listed(problems, self.source)

    def recap(self) -> None:
        """The answers given so far (on resume), so the person knows where they stand."""
        if not self.known:
            return
        self.out(f"answers so far ({len(self.known)}):")
        for key, value in self.known.items():
            self.out(f"  {key}: {wording.cap(_shown(value), 100)}")


def _shown(value: Any) -> str:
    if isinstance(value, list):
        return ", ".join(_fields_text([v]) if isinstance(v, dict) and "type" in v else str(v) for v in value)
    return "yes" if value is True else "no" if value is False else str(value)


# --- the questions --------------------------------------------------------------------------------------------


def ask_pipeline(s: Session, current: dict[str, Any] | None = None) -> dict[str, Any]:
    cur = current or {}
    name = s.ask(PIPELINE["name"].question("pipeline.name", "Pipeline name", "Used in every alert and file name; "
                                           "lower case.", default=cur.get("pipeline", "my-pipeline")))
    context = s.ask(PIPELINE["context"].question(
        "pipeline.context", "Who produces the data?", "Businesses and machines change their data within hours; a "
        "large consumer population within days. This sets how fast windows must react.",
        default=cur.get("context", "business")))
    budget = s.ask(PIPELINE["false_alarms_per_week"].question(
        "pipeline.false_alarms_per_week", "False pages per week you can live with", "Split over all paging checks; "
        "each check's threshold is set so that noise alone stays within its share.",
        default=cur.get("false_alarms_per_week", 1)))
    owner = s.ask(PIPELINE["owner"].question("pipeline.owner", "Team that owns the pipeline (for alert routing)",
                                             "Alerts carry it as the owner label; Alertmanager routes on it.",
                                             default=cur.get("owner", "ml-team")))
    out = {"pipeline": name, "context": context, "false_alarms_per_week": budget}
    if owner:
        out["owner"] = owner
    return out


def run(session: Session, output: str, existing_plan: str | None = None, inputs: Sequence[str] = ()) -> list[str]:
    """The whole interview; returns lines telling where the files went.

    ``inputs`` are files the command read (answers, a draft): never written over. The plan at ``output`` is
    replaced only if nobody changed it since the interview read it.
    """
    from stagewatch import interview_gaps, interview_review  # they build on the questions above

    plan_path = Path(output)
    sources = [str(p) for p in (*inputs, existing_plan) if p]
    resolve_target(plan_path, [p for p in sources if p != existing_plan])
    expected = Snapshot.take(plan_path)
    existing = None
    current_head: dict[str, Any] = {}
    current_stages: list[dict[str, Any]] = []
    if existing_plan:
        existing, existing_doc = load_plan(existing_plan)
        if existing_doc.snapshot().path == expected.path:
            expected = existing_doc.snapshot()  # revising the plan in place: merged from what was read
        current_head = {k: v for k, v in existing.items() if k in ("pipeline", "context", "false_alarms_per_week",
                                                                   "owner")}
        current_stages = [{k: v for k, v in st.items() if k not in ("metrics", "downstream_reach")}
                          for st in existing["stages"]]
    head = ask_pipeline(session, current_head)
    stages: list[dict[str, Any]] = []
    touched: list[str] = []
    if existing:
        stages = [dict(st) for st in current_stages]
        while True:
            action = session.ask(REVISE.question(f"revise.{len(touched)}", "What do you want to change?",
                                                 "Add a stage, revise one, or finish and merge into the plan.",
                                                 default="finish"))
            if action == "finish":
                break
            if action == "add a stage":
                stage = ask_stage(session, len(stages), None, head, stages, prefix=f"revise.{len(touched)}.stage")
                stages.append(stage)
            else:
                ids = [st["id"] for st in stages]
                target = session.ask(WHICH.question(f"revise.{len(touched)}.which", "Which stage?", "",
                                                    default=ids[0], choices=ids))
                i = ids.index(target)
                others = [st for st in stages if st["id"] != target]
                stage = ask_stage(session, i, len(stages), head, others[:i], current=stages[i],
                                  prefix=f"revise.{len(touched)}.stage")
                if stage["id"] != target:
                    for st in stages:
                        st["upstream"] = [stage["id"] if u == target else u for u in st.get("upstream", [])]
                stages[i] = stage
            touched.append(stage["id"])
    else:
        answered = answered_stages(session.known)
        count = session.ask(PIPELINE["stage_count"].question(
            "pipeline.stage_count", "How many stages? (0 if you want to add them one by one)",
            "Counting sources, gates, models and rule steps.", default=max(answered) + 1 if answered else 5))
        if not session.interactive:
            _every_stage_answered(session, count, answered)
        i = 0
        while True:
            stages.append(ask_stage(session, i, count or None, head, stages))
            i += 1
            if count and i >= count:
                break
            # without a terminal, a stage nobody answered for is not added (the default would add them forever)
            if not count and not session.ask(CONFIRM.question(f"stages.{i}.more", "Add another stage?",
                                                              "Stop when every stage is in.",
                                                              default=session.interactive or i in answered)):
                break
        touched = [st["id"] for st in stages]
    description = {**head, "stages": stages}
    pipeline = _pipeline(description)
    plan = compose(pipeline, existing=existing)
    interview_review.review(session, plan, touched, lambda p: compose(pipeline, existing=p))
    plan = compose(pipeline, existing=plan)
    if plan_path.exists() and not existing_plan:
        existing_on_disk, disk_doc = load_plan(str(plan_path))
        expected = disk_doc.snapshot()
        plan = compose(pipeline, existing=_merge_statuses(plan, existing_on_disk))
    plan = interview_gaps.close(session, plan, pipeline, str(plan_path))
    session.finish()
    description_path = plan_path.with_name(plan_path.stem + ".pipeline.yaml")
    text = yamlio.dump(description)
    kept = []
    resolve_target(description_path, sources)
    yamlio.write_atomic(plan_path, dump(plan), inputs=[p for p in sources if p != existing_plan],
                        expected=expected)
    if description_path.exists() and description_path.read_text(encoding="utf-8") != text:
        previous = description_path.with_name(plan_path.stem + ".pipeline.previous.yaml")
        # never overwrite what may be a hand-edited description: keep a copy, through the one safe write path
        yamlio.write_atomic(previous, description_path.read_text(encoding="utf-8"), inputs=[plan_path])
        kept.append(f"kept the earlier description as {previous}")
    yamlio.write_atomic(description_path, text, inputs=sources)
    n = len(all_metrics(plan))
    decided = sum(1 for m in all_metrics(plan) if m["status"] != "proposed")
    return [f"wrote {plan_path}: {n} metrics, {decided} decided in this interview",
            f"wrote {description_path}: the pipeline description (use it with `stagewatch propose`)", *kept]


def _every_stage_answered(session: Session, count: int, answered: set[int]) -> None:
    """Without a terminal, every stage the interview would make has answers of its own: a stage count larger than
    the stages answered, or a stage number skipped, is refused rather than filled with made-up stages."""
    made = count or (max(answered) + 1 if answered else 1)
    missing = [i for i in range(made) if i not in answered]
    if not missing:
        return
    names = ", ".join(f"stages.{i}" for i in missing)
    given = str(session.known.get("pipeline.stage_count", "")).strip() == str(count)  # and not refused
    if not answered:
        message = "the answers give no stage (stages are numbered from 0)"
        expected = "answers for each stage, at least stages.0.id; the stage count follows from the highest stage"
    elif given:
        message = (f"pipeline.stage_count is {count}, but nothing is answered for {names} (stages are numbered "
                   "from 0); stages are not made up")
        expected = f"pipeline.stage_count: {max(answered) + 1}, or answers for {names}, at least stages.{missing[0]}.id"
    else:
        message = (f"the answers give stages up to stages.{max(answered)}, but nothing for {names} (stages are "
                   "numbered from 0); stages are not made up")
        expected = f"answers for {names}, at least stages.{missing[0]}.id, or the stages renumbered from 0"
    line = session.lines.get("pipeline.stage_count") if given else None
    if session.problems:
        raise listed([*session.problems, (line, f"{message} (expected: {expected})")], session.source)
    raise StagewatchError(message, file=session.source, line=line, expected=expected)


def _merge_statuses(fresh: dict[str, Any], on_disk: dict[str, Any]) -> dict[str, Any]:
    """A plan already at the output path: its human decisions win over this interview's defaults."""
    # A metric without a fingerprint on disk was edited by a person (plan.compose drops it on the first edit).
    edited = {m["id"]: m for m in all_metrics(on_disk) if "fingerprint" not in m}
    for stage in fresh["stages"]:
        stage["metrics"] = [edited.get(m["id"], m) for m in stage["metrics"]]
    return fresh


def _pipeline(description: dict[str, Any]) -> spec.Pipeline:
    doc = yamlio.Document("<interview>", description, None)
    pipeline = spec.from_document(doc)
    PipelineGraph.build(pipeline, doc)
    return pipeline


