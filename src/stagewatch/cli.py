"""Command line: parse options, call one library function, turn errors into messages and exit codes.

Exit codes: 0 success, 1 findings (lint) or failed checks, 2 unreadable input or bad usage, 3 internal error,
130 interrupted.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import sys
import tempfile
import traceback
from typing import Callable, NoReturn, Sequence

from stagewatch import __version__
from stagewatch.errors import (EXIT_FINDINGS, EXIT_INTERNAL, EXIT_INTERRUPTED, EXIT_OK, EXIT_USAGE,
                               StagewatchError)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:  # usage errors: one line and exit 2, as argparse does, plus a hint
        self.print_usage(sys.stderr)
        print(f"{self.prog}: error: {message}\n(run '{self.prog} --help' for details)", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)


def _propose(args: argparse.Namespace) -> int:
    from stagewatch.propose import propose

    text, rep = propose(args.pipeline, args.output, args.catalog, args.baseline)
    if rep is None:
        sys.stdout.write(text)
    else:
        print("\n".join(rep.lines()))
    return EXIT_OK


def _lint(args: argparse.Namespace) -> int:
    from stagewatch.lint import INVALID, lint_file

    findings = lint_file(args.plan)
    if args.format == "json":
        print(json.dumps({"file": args.plan, "clean": not findings,
                          "findings": [f.to_dict() for f in findings]}, indent=2))
    else:
        for f in findings:
            print(f)
        print(f"{args.plan}: {'clean' if not findings else f'{len(findings)} finding(s)'}", file=sys.stderr)
    if any(f.code in INVALID for f in findings):
        return EXIT_USAGE  # the plan is invalid input, as render and export say; its violations are listed above
    return EXIT_FINDINGS if findings else EXIT_OK


def _render(args: argparse.Namespace) -> int:
    from stagewatch.plan import load_plan
    from stagewatch.render import render

    plan, _ = load_plan(args.plan)
    if args.format == "html":
        from stagewatch.render_html import render as render_html

        render = render_html
    for path in render(plan, args.output, inputs=[args.plan], force=args.force):
        print(f"wrote {path}")
    return EXIT_OK


def _explain(args: argparse.Namespace) -> int:
    from stagewatch.explain import explain
    from stagewatch.plan import load_plan

    plan, _ = load_plan(args.plan)
    print(explain(plan, args.metric, args.plan))
    return EXIT_OK


def _schema(args: argparse.Namespace) -> int:
    from stagewatch.resources import schema

    print(json.dumps(schema(args.kind), indent=2))
    return EXIT_OK


def _demo(args: argparse.Namespace) -> int:
    from stagewatch.demo import run_demo

    from stagewatch.data.report import print_table

    lines, result = run_demo(args.output)
    for line in lines:
        print(line)
    print()
    print_table(result, only_alerts=True)
    return EXIT_OK


def _export(args: argparse.Namespace) -> int:
    from stagewatch.exporters import export

    for line in export(args.plan, args.to, args.output, force=args.force):
        print(line)
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    from stagewatch.resources import SCHEMA_KINDS

    parser = _Parser(prog="stagewatch", description="Decide what to watch in a multi-stage ML pipeline: propose "
                     "software, input and output metrics per stage and per hand-off, size their windows and "
                     "thresholds, review the plan, render it and export it to monitoring tools.")
    parser.add_argument("--version", action="version", version=f"stagewatch {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("propose", help="propose a plan for a pipeline description (merges with an existing plan)",
                       description="Propose metrics, windows and thresholds for every stage, hand-off and the "
                       "whole pipeline. If PLAN exists, merge: reviewer edits, notes and rejections are kept, "
                       "new metrics added, metrics whose rule no longer applies marked stale.")
    p.add_argument("pipeline", metavar="PIPELINE.yaml", help="the pipeline description")
    p.add_argument("-o", "--output", metavar="PLAN.yaml", help="plan file to write or merge into (default: stdout)")
    p.add_argument("--catalog", metavar="DIR", help="use the rule catalog in DIR instead of the shipped one")
    p.add_argument("--baseline", metavar="BASELINE_DIR", help="raise thresholds to what the reference data needs "
                   "(a baseline from `stagewatch calibrate --thresholds`); reviewers' numbers are kept")
    p.set_defaults(func=_propose)

    p = sub.add_parser("lint", help="check a plan's form and coverage",
                       description="Check a plan: schema, every stage watched in all three layers, every hand-off "
                       "checked on both sides, warn before critical, windows valid, ids unique, budget kept. "
                       "Exit 0 clean, 1 findings, 2 unreadable input.")
    p.add_argument("plan", metavar="PLAN.yaml")
    p.add_argument("--format", choices=("text", "json"), default="text", help="output format (json for CI bots)")
    p.set_defaults(func=_lint)

    p = sub.add_parser("render", help="write the plan as Markdown (or HTML) for review",
                       description="Write DIR/plan.md: summary, Mermaid diagram, per-stage metrics by layer, "
                       "hand-off table and open decisions. --format html writes DIR/plan.html instead: one "
                       "self-contained page with the pipeline drawn as SVG, open decisions first and each stage's "
                       "detail collapsible.")
    p.add_argument("plan", metavar="PLAN.yaml")
    p.add_argument("-o", "--output", metavar="DIR", required=True,
                   help="directory to write into (-: standard output)")
    p.add_argument("--format", choices=("markdown", "html"), default="markdown",
                   help="markdown (default, plan.md) or html (plan.html)")
    p.add_argument("--force", action="store_true",
                   help="write over a file edited by hand since it was rendered (the edited one is kept as .bak)")
    p.set_defaults(func=_render)

    p = sub.add_parser("explain", help="show how one metric's window and thresholds were derived")
    p.add_argument("plan", metavar="PLAN.yaml")
    p.add_argument("metric", metavar="METRIC_ID", help="e.g. grade_assigner.input.weight_g_drift")
    p.set_defaults(func=_explain)

    p = sub.add_parser("export", help="write configuration for a monitoring system",
                       description="Export a plan: --to prometheus writes rule files, rule unit tests, an "
                       "Alertmanager configuration and the instrumentation spec into DIR; --to checks writes one "
                       "JSON check configuration file.")
    p.add_argument("plan", metavar="PLAN.yaml")
    p.add_argument("--to", required=True, choices=("prometheus", "checks"))
    p.add_argument("-o", "--output", required=True, metavar="DIR_OR_FILE")
    p.add_argument("--force", action="store_true",
                   help="write over files edited by hand since the last export (each edited one is kept as .bak)")
    p.set_defaults(func=_export)

    p = sub.add_parser("demo", help="run the whole flow on the bundled packhouse demo",
                       description="Write the demo pipeline, its plan, the rendered plan and the exports into DIR, "
                       "and print where each file went. Re-running merges into the plan already there.")
    p.add_argument("-o", "--output", metavar="DIR", default="stagewatch-demo", help="default: ./stagewatch-demo")
    p.set_defaults(func=_demo)

    p = sub.add_parser("schema", help="print a JSON Schema (pipeline, plan, catalog, checks)")
    p.add_argument("kind", choices=SCHEMA_KINDS)
    p.set_defaults(func=_schema)

    from stagewatch.commands_data import add_parsers as add_data_commands

    add_data_commands(sub)

    try:
        from stagewatch.commands_interview import add_parser as add_interview
    except ImportError:  # pragma: no cover - interview not installed
        pass
    else:
        add_interview(sub)
    return parser


def _internal(exc: BaseException) -> int:
    fd, log = tempfile.mkstemp(prefix="stagewatch-crash-", suffix=".log")
    with os.fdopen(fd, "w") as handle:
        traceback.print_exception(type(exc), exc, exc.__traceback__, file=handle)
    print(f"stagewatch: internal error ({type(exc).__name__}: {exc}). This is a bug in stagewatch, not in your "
          f"files; the details are in {log}", file=sys.stderr)
    return EXIT_INTERNAL


# The planning commands build and walk millions of small objects (a 1,000-stage plan is a million YAML nodes),
# none of them in reference cycles that matter; Python's cyclic collector would pass over all of them again and
# again, half the time of a large re-propose. Reference counting still frees everything, so memory is unchanged.
_WITHOUT_CYCLE_COLLECTOR = (_propose, _lint, _render, _explain, _export)


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    func: Callable[[argparse.Namespace], int] = args.func
    collecting = gc.isenabled()
    if func in _WITHOUT_CYCLE_COLLECTOR:
        gc.disable()
    try:
        return func(args)
    except StagewatchError as exc:
        print(f"stagewatch: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("stagewatch: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        return EXIT_OK
    except Exception as exc:  # noqa: BLE001 - the one place that catches everything
        return _internal(exc)
    finally:
        if collecting:
            gc.enable()  # as it was: main() also runs inside other programs (and the tests)
