"""`stagewatch interview`: its argument parser, drafts saved on Ctrl-C and answers files. The questions and the
session are in :mod:`stagewatch.interview`, imported when the command runs (and looked up there, so that tests
can replace its prompt)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from stagewatch.errors import EXIT_INTERRUPTED, EXIT_OK, StagewatchError

DRAFT_VERSION = 1


def save_draft(path: Path, session: Any, output: str, existing_plan: str | None) -> None:
    from stagewatch import yamlio

    data = {"draft_version": DRAFT_VERSION, "output": output, "plan": existing_plan,
            "answers": {**session.known, **session.answers}}
    yamlio.write_atomic(path, "# stagewatch interview draft: resume with `stagewatch interview --resume THIS`\n"
                        + yamlio.dump(data))


def load_answers(path: str) -> dict[str, Any]:
    """The answers of an answers file or a draft, with the line of each key (``lines``), every key and value
    checked as far as they can be before the first question."""
    from stagewatch import yamlio
    from stagewatch.interview_keys import check_answers

    doc = yamlio.load(path)
    data = doc.data
    within: list[str] = []
    if isinstance(data, dict) and "draft_version" in data:
        within = ["answers"]
        answers = data.get("answers") or {}
        if not isinstance(answers, dict):
            raise StagewatchError("a draft's 'answers' is a mapping of question keys to answers", file=path,
                                  line=doc.line_of(["answers"]), expected="answers: {pipeline.name: ...}")
        for key in ("output", "plan"):
            if data.get(key) is not None and not isinstance(data[key], str):
                raise StagewatchError(f"a draft's '{key}' is a file name", file=path, line=doc.line_of([key]),
                                      expected=f"{key}: plan.yaml")
        data = {**data, "answers": answers}
    elif not isinstance(data, dict):
        raise StagewatchError("an answers file is a mapping of question keys to answers", file=path, line=1,
                              expected="pipeline.name: my-pipeline")
    else:
        data = {"answers": data}
    for key in data["answers"]:
        if not isinstance(key, str):
            raise StagewatchError(f"question key {key!r} is not text", file=path,
                                  expected="keys as written in a saved draft, such as pipeline.name")
    data["lines"] = {key: doc.line_of([*within, key]) for key in data["answers"]}
    check_answers(data["answers"], path, data["lines"])
    return data


def _from_draft(value: str | None, key: str, draft: str) -> str | None:
    """A path a draft file names, kept inside the working directory or the draft's own directory (where the
    interview saves it, beside the plan): a draft is data, and data may be hostile."""
    if value is None:
        return None
    real = Path(value).resolve()
    if not any(real.is_relative_to(d) for d in (Path.cwd().resolve(), Path(draft).resolve().parent)):
        raise StagewatchError(f"the draft names '{value}' as its {key}, which is outside the working directory "
                              "and the draft's directory",
                              file=draft, expected=f"give that path on the command line to confirm it "
                              f"({'-o' if key == 'output' else 'PLAN.yaml'})")
    return value


def command(args: argparse.Namespace) -> int:
    from stagewatch import interview

    known: dict[str, Any] = {}
    lines: dict[str, int | None] = {}
    output = args.output
    existing_plan = args.plan
    if args.resume:
        draft = load_answers(args.resume)
        known.update(draft["answers"])
        lines.update(draft["lines"])
        output = output or _from_draft(draft.get("output"), "output", args.resume)
        existing_plan = existing_plan or _from_draft(draft.get("plan"), "plan", args.resume)
    if args.answers:
        answers = load_answers(args.answers)
        known.update(answers["answers"])
        lines.update(answers["lines"])
    output = output or existing_plan or "plan.yaml"
    interactive = not args.answers
    if interactive and not interview.has_terminal():
        raise StagewatchError("the interview needs a terminal; without one, replay answers with "
                              "`stagewatch interview --answers FILE`, or write a pipeline description and run "
                              "`stagewatch propose PIPELINE.yaml -o PLAN.yaml`")
    session = interview.Session(known, interactive=interactive, source=args.answers or args.resume or "<answers>",
                                lines=lines)
    if args.resume:
        session.recap()
    draft_path = Path(args.resume) if args.resume else Path(output).with_name(Path(output).stem + ".draft.yaml")
    try:
        said = interview.run(session, output, existing_plan, inputs=[p for p in (args.answers, args.resume) if p])
    except (interview.Interrupted, KeyboardInterrupt):  # at a prompt or while the plan is being composed
        save_draft(draft_path, session, output, existing_plan)
        print(f"\nstopped; your answers are saved in {draft_path}\n"
              f"continue with: stagewatch interview --resume {draft_path}", file=sys.stderr)
        return EXIT_INTERRUPTED
    for line in said:
        print(line)
    if args.resume and draft_path.exists():
        draft_path.unlink()
        print(f"removed the draft {draft_path}: everything in it is in the plan now")
    return EXIT_OK


def add_parser(sub: Any) -> None:
    p = sub.add_parser("interview", help="build a plan by answering questions in the terminal",
                       description="Walk through the pipeline stage by stage, review the proposal, and write a "
                       "lint-clean plan and its pipeline description. Ctrl-C saves a draft. With PLAN.yaml, "
                       "reopen that plan to add or revise stages, then merge as propose does.")
    p.add_argument("plan", nargs="?", metavar="PLAN.yaml", help="an existing plan to revise")
    p.add_argument("-o", "--output", metavar="PLAN.yaml", help="where to write the plan (default: plan.yaml)")
    p.add_argument("--resume", metavar="DRAFT", help="continue an interview saved on Ctrl-C")
    p.add_argument("--answers", metavar="FILE", help="replay answers from FILE without a terminal (unanswered "
                   "questions take their defaults)")
    p.set_defaults(func=command)
