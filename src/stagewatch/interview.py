"""`interview`: from a blank page to a reviewed plan in one sitting, in the terminal.

Questions are data (:class:`Question`); :func:`prompt` is the one function that talks to the terminal (through
questionary), and tests or ``--answers`` replace it. Every answer is stored under a stable key
(``pipeline.name``, ``stages.2.kind``, ``review.grader.input``...), so a draft saved on Ctrl-C, an answers file and
a resumed session are the same thing: answers looked up before anything is asked.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Sequence

from stagewatch import spec, yamlio
from stagewatch.errors import StagewatchError
from stagewatch.graph import PipelineGraph
from stagewatch.lint import lint_document
from stagewatch.plan import all_metrics, compose, dump, load_plan
from stagewatch.safewrite import Snapshot, resolve_target
from stagewatch.interview_answers import (FIELD_TYPES, _duration, _fields_text, _name_validator, _number,  # noqa: F401
                                          _optional_number, _parse_fields, _positive)

KINDS = ["learned", "rule-based", "source"]
MODALITIES = ["tabular", "image", "video", "audio", "text", "events", "timeseries"]
OUTPUTS = ["class", "attribute", "score", "value", "ranking", "gate", "segments", "text", "records"]
SERVING = ["online", "batch", "device"]
CHANGE_RATES = ["minutes", "hours", "days", "months"]
LABELS = ["delayed", "immediate", "none"]
LAYERS = ("software", "input", "output")
STRUCTURED = ("tabular", "events", "timeseries")

Answers = dict[str, Any]


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
    """Asks questions in order, taking answers already known (draft, answers file) instead of prompting."""

    def __init__(self, known: Answers | None = None, interactive: bool = True, out: Callable[[str], None] = print):
        self.known = dict(known or {})
        self.answers: Answers = {}
        self.interactive = interactive
        self.out = out
        self.asked: set[str] = set()

    def ask(self, question: Question) -> Any:
        self.asked.add(question.key)
        if question.key in self.known:
            value = _known_answer(question, self.known[question.key])
            if question.validate is not None:
                problem = question.validate(value)
                if problem:
                    raise StagewatchError(f"answer to '{question.key}' ({question.text}): {problem}",
                                          expected=question.help)
        elif not self.interactive:
            if question.default is None and question.kind == "text":
                raise StagewatchError(f"no answer for '{question.key}' ({question.text}) and no default",
                                      expected=f"'{question.key}: ...' in the answers file")
            value = question.default
        else:
            self.out(f"  why: {question.help}" if question.help else "")
            value = prompt(question)
        self.answers[question.key] = value
        return value

    def unused(self) -> list[str]:
        return sorted(k for k in self.known if k not in self.asked)


def _known_answer(question: Question, value: Any) -> Any:
    """An answer from a file or a draft, held to the same form the prompt would have produced."""
    def bad(expected: str) -> StagewatchError:
        return StagewatchError(f"answer to '{question.key}' ({question.text}): {value!r} is not allowed",
                               expected=expected)

    if question.kind == "select" and value not in (question.choices or []):
        raise bad("one of " + ", ".join(map(str, question.choices or [])))
    if question.kind == "confirm" and not isinstance(value, bool):
        raise bad("true or false")
    if question.kind == "checkbox" and not (isinstance(value, list) and all(v in (question.choices or [])
                                                                             for v in value)):
        raise bad("a list among " + ", ".join(map(str, question.choices or [])))
    if question.kind == "text" and question.convert and isinstance(value, str):
        try:
            value = question.convert(value)
        except ValueError as exc:
            raise bad(str(exc)) from None
    return value


# --- the questions --------------------------------------------------------------------------------------------


def ask_pipeline(s: Session, current: dict[str, Any] | None = None) -> dict[str, Any]:
    cur = current or {}
    name = s.ask(Question("pipeline.name", "Pipeline name", "Used in every alert and file name; lower case.",
                          default=cur.get("pipeline", "my-pipeline"), validate=_name_validator(set())))
    context = s.ask(Question("pipeline.context", "Who produces the data?",
                             "Businesses and machines change their data within hours; a large consumer "
                             "population within days. This sets how fast windows must react.", "select",
                             ["business", "consumer"], default=cur.get("context", "business")))
    budget = s.ask(Question("pipeline.false_alarms_per_week", "False pages per week you can live with",
                            "Split over all paging checks; each check's threshold is set so that noise alone "
                            "stays within its share.", default=cur.get("false_alarms_per_week", 1),
                            validate=_positive, convert=_number))
    owner = s.ask(Question("pipeline.owner", "Team that owns the pipeline (for alert routing)",
                           "Alerts carry it as the owner label; Alertmanager routes on it.",
                           default=cur.get("owner", "ml-team")))
    out = {"pipeline": name, "context": context, "false_alarms_per_week": budget}
    if owner:
        out["owner"] = owner
    return out


def _default_output(kind: str) -> str:
    return {"learned": "class", "rule-based": "gate", "source": "records"}[kind]


def ask_stage(s: Session, index: int, total: int | None, head: dict[str, Any], earlier: list[dict[str, Any]],
              current: dict[str, Any] | None = None, prefix: str | None = None) -> dict[str, Any]:
    """Questions for one stage. A typical stage takes 7 questions when the defaults are accepted."""
    cur = current or {}
    key = prefix or f"stages.{index}"
    s.out(f"-- stage {index + 1} of {total} --" if total else f"-- stage {index + 1} --")
    taken = {st["id"] for st in earlier}
    previous = earlier[-1] if earlier else {}
    stage: dict[str, Any] = {}
    stage["id"] = s.ask(Question(f"{key}.id", "Stage id", "Short name used in metric ids, e.g. frame_gate.",
                                 default=cur.get("id", f"stage_{index + 1}"), validate=_name_validator(taken)))
    stage["kind"] = s.ask(Question(f"{key}.kind", "What kind of stage is it?",
                                   "learned: a trained model; rule-based: fixed logic such as a gate or a "
                                   "filter; source: where data enters (sensor, feed, log).", "select", KINDS,
                                   default=cur.get("kind", "source" if not earlier else "learned")))
    stage["modality"] = s.ask(Question(f"{key}.modality", "What does it take in?",
                                       "The modality of its input decides the input metrics (brightness for "
                                       "images, length for text ...).", "select", MODALITIES,
                                       default=cur.get("modality", previous.get("modality", "tabular"))))
    stage["output"] = s.ask(Question(f"{key}.output", "What does it put out?",
                                     "gate: passes on, drops or clips its input; attribute: a category that may be "
                                     "unknown; the output kind decides the output metrics.", "select", OUTPUTS,
                                     default=cur.get("output", _default_output(stage["kind"]))))
    if earlier:
        names = [st["id"] for st in earlier]
        stage["upstream"] = s.ask(Question(
            f"{key}.upstream", "Which stages feed it? (space to pick, enter to confirm)",
            "Each hand-off gets the same check on both sides, so a shift can be placed before or after it.",
            "checkbox", names, default=cur.get("upstream", [names[-1]] if stage["kind"] != "source" else [])))
    else:
        stage["upstream"] = []
    stage["volume_per_hour"] = s.ask(Question(
        f"{key}.volume_per_hour", "Items per hour at a typical hour",
        "Sets how many samples a window holds, hence how short a window can be and still be trusted.",
        default=cur.get("volume_per_hour", previous.get("volume_per_hour", 1000)), validate=_positive,
        convert=_number))
    if stage["modality"] in STRUCTURED:
        fields = s.ask(Question(
            f"{key}.inputs", "Input fields to watch, as name:type, comma separated (blank for none)",
            "Each field gets its own drift, missing-share and range checks; types: " + ", ".join(FIELD_TYPES)
            + ". Ranges and categories can be added in the YAML later.",
            default=_fields_text(cur.get("inputs", [])), convert=_parse_fields))
        if fields:
            stage["inputs"] = fields
    serving = cur.get("serving", previous.get("serving", "online"))
    change_rate = cur.get("change_rate", spec.DEFAULT_CHANGE_RATE[head["context"]])
    labels = cur.get("labels", "delayed" if stage["kind"] == "learned" else "none")
    label_delay = cur.get("label_delay", "1d")
    summary = f"serving {serving}, data changes within {change_rate}"
    if stage["kind"] == "learned":
        summary += f", labels {labels}" + (f" after {label_delay}" if labels == "delayed" else "")
    if cur.get("latency_slo_ms"):
        summary += f", latency SLO {cur['latency_slo_ms']:g} ms"
    keep = s.ask(Question(f"{key}.keep_defaults", f"Keep the usual settings ({summary})?",
                          "Say no to set serving, change rate, latency SLO and labels yourself.", "confirm",
                          default=True))
    latency = cur.get("latency_slo_ms")
    if not keep:
        serving = s.ask(Question(f"{key}.serving", "How is it served?",
                                 "online: answers requests; batch: runs on a schedule; device: runs on users' or "
                                 "machines' devices. Decides the software metrics.", "select", SERVING,
                                 default=serving))
        change_rate = s.ask(Question(f"{key}.change_rate", "How fast can its input change?",
                                     "A retuned machine or new supplier changes data in minutes; a large user base "
                                     "over months. The window must be shorter than this.", "select", CHANGE_RATES,
                                     default=change_rate))
        if serving == "online":
            latency = s.ask(Question(f"{key}.latency_slo_ms", "Latency SLO in ms (blank for none)",
                                     "With an SLO you get burn-rate alerts on slow requests.",
                                     default=latency if latency is not None else "", convert=_optional_number,
                                     validate=lambda v: None if v is None else _positive(v)))
        if stage["kind"] == "learned":
            labels = s.ask(Question(f"{key}.labels", "Do its predictions get ground-truth labels?",
                                    "With labels the plan watches quality itself; without, a proxy.", "select",
                                    LABELS, default=labels))
            if labels == "delayed":
                label_delay = s.ask(Question(f"{key}.label_delay", "How long until labels arrive? (e.g. 3d)",
                                             "Quality windows are evaluated this long after they close.",
                                             default=label_delay, validate=_duration))
    stage["serving"] = serving
    stage["change_rate"] = change_rate
    if serving == "online" and latency:
        stage["latency_slo_ms"] = latency
    if stage["kind"] == "learned":
        stage["labels"] = labels
        if labels == "delayed":
            stage["label_delay"] = label_delay
    for extra in ("description", "owner", "labelled_share", "slo_target", "slo_period", "run_every", "outputs"):
        if extra in cur:
            stage[extra] = cur[extra]
    if "inputs" in stage:  # keep what the YAML said about a field (range, categories ...) when its type stays
        before = {f["name"]: f for f in cur.get("inputs", [])}
        stage["inputs"] = [{**before[f["name"]], **f} if f["name"] in before and before[f["name"]]["type"] == f["type"]
                           else f for f in stage["inputs"]]
    if stage["kind"] == "source":
        stage.pop("labels", None)
    return stage


def run(session: Session, output: str, existing_plan: str | None = None, inputs: Sequence[str] = ()) -> list[str]:
    """The whole interview; returns lines telling where the files went.

    ``inputs`` are files the command read (answers, a draft): never written over. The plan at ``output`` is
    replaced only if nobody changed it since the interview read it.
    """
    from stagewatch import interview_review  # it builds on the questions above

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
            action = session.ask(Question(f"revise.{len(touched)}", "What do you want to change?",
                                          "Add a stage, revise one, or finish and merge into the plan.", "select",
                                          ["add a stage", "revise a stage", "finish"], default="finish"))
            if action == "finish":
                break
            if action == "add a stage":
                stage = ask_stage(session, len(stages), None, head, stages, prefix=f"revise.{len(touched)}.stage")
                stages.append(stage)
            else:
                target = session.ask(Question(f"revise.{len(touched)}.which", "Which stage?", "", "select",
                                              [st["id"] for st in stages], default=stages[0]["id"]))
                i = [st["id"] for st in stages].index(target)
                others = [st for st in stages if st["id"] != target]
                stage = ask_stage(session, i, len(stages), head, others[:i], current=stages[i],
                                  prefix=f"revise.{len(touched)}.stage")
                if stage["id"] != target:
                    for st in stages:
                        st["upstream"] = [stage["id"] if u == target else u for u in st.get("upstream", [])]
                stages[i] = stage
            touched.append(stage["id"])
    else:
        count = session.ask(Question("pipeline.stage_count", "How many stages? (0 if you want to add them one by one)",
                                     "Counting sources, gates, models and rule steps.", default=5,
                                     validate=lambda v: None if isinstance(v, int) and 0 <= v <= 200 else
                                     "a whole number from 0 to 200",
                                     convert=lambda t: int(t) if str(t).strip().isdigit() else -1))
        i = 0
        while True:
            stages.append(ask_stage(session, i, count or None, head, stages))
            i += 1
            if count and i >= count:
                break
            if not count and not session.ask(Question(f"stages.{i}.more", "Add another stage?",
                                                      "Stop when every stage is in.", "confirm", default=True)):
                break
        touched = [st["id"] for st in stages]
    description = {**head, "stages": stages}
    pipeline = _pipeline(description)
    plan = compose(pipeline, existing=existing)
    interview_review.review(session, plan, touched)
    plan = compose(pipeline, existing=plan)
    undecided = [m["id"] for m in all_metrics(plan) if m["status"] == "stale"
                 and m.get("previous_status", "proposed") == "proposed" and not m.get("note")]
    if undecided:
        session.out(f"{len(undecided)} metric(s) no longer apply and nobody decided on them: " + ", ".join(undecided))
        if session.ask(Question("gaps.drop_stale", "Remove them from the plan?",
                                "They came from rules that no longer match your stages; nothing a person wrote "
                                "is in them.", "confirm", default=True)):
            _drop(plan, set(undecided))
    for m in [m for m in all_metrics(plan) if m["status"] == "stale" and m["id"] not in undecided]:
        if session.ask(Question(f"gaps.stale.{m['id']}", f"{m['id']} no longer applies (it was "
                                f"{m.get('previous_status', 'proposed')}). Remove it? (no: keep it as a manual metric)",
                                "Its rule no longer matches the stage; a manual metric stays until you delete it.",
                                "confirm", default=True)):
            _drop(plan, {m["id"]})
        else:
            m["source"] = "manual"
            m["status"] = m.pop("previous_status", "proposed")
            m.pop("review", None)
            m.pop("fingerprint", None)
    findings = lint_document(yamlio.Document(str(plan_path), plan, None))
    if findings:
        session.out("coverage gaps left:")
        for f in findings:
            session.out(f"  [{f.code}] {f.message}")
        if session.ask(Question("gaps.fix", "Reopen the rejected metrics behind these gaps for review?",
                                "They go back to 'proposed'; you can reject them again in code review with a "
                                "note.", "confirm", default=True)):
            interview_review.restore_gaps(plan, findings)
            plan = compose(pipeline, existing=plan)
    unused = session.unused()
    if unused:
        raise StagewatchError("the answers include keys no question asked: " + ", ".join(unused[:8]),
                              expected="keys as written in a saved draft")
    description_path = plan_path.with_name(plan_path.stem + ".pipeline.yaml")
    if plan_path.exists() and not existing_plan:
        existing_on_disk, disk_doc = load_plan(str(plan_path))
        expected = disk_doc.snapshot()
        plan = compose(pipeline, existing=_merge_statuses(plan, existing_on_disk))
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


def _drop(plan: dict[str, Any], ids: set[str]) -> None:
    for stage in plan["stages"]:
        stage["metrics"] = [m for m in stage["metrics"] if m["id"] not in ids]
    for key in ("pipeline_metrics", "retired_metrics"):
        if key in plan:
            plan[key] = [m for m in plan[key] if m["id"] not in ids]


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


