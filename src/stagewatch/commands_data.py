"""The data commands' argument parsers and handlers: calibrate, check and replay. Thin: options to keyword
arguments, and the choice of engine (``--engine``, ``--counts``, ``--emit-sql``)."""

from __future__ import annotations

import argparse
import contextlib
import sys
from typing import Any, Callable, Iterator


@contextlib.contextmanager
def _progress(total: int, engine: Any = None) -> Iterator[Callable[[str], None] | None]:
    """A transient progress display on a terminal (none when stderr is not one, as in CI or a pipe): the stage
    being scanned and, on a scan that takes more than a second, how far DuckDB got."""
    if not sys.stderr.isatty():
        yield None
        return
    from rich.console import Console
    from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    with Progress(SpinnerColumn(), TextColumn("scanning {task.description}"), TimeElapsedColumn(),
                  console=Console(stderr=True), transient=True) as bar:
        task = bar.add_task("", total=total)
        current = [""]

        def step(stage: str) -> None:
            current[0] = stage
            bar.update(task, description=stage, advance=1)

        def percent(share: float) -> None:
            bar.update(task, description=f"{current[0]} ({share:.0f}% of this query)")

        if engine is not None:
            engine.on_progress = percent
        try:
            yield step
        finally:
            if engine is not None:
                engine.on_progress = None


def _engine(args: argparse.Namespace) -> tuple[Any, dict[str, Any]]:
    """The engine the options ask for, and each stage's location."""
    from stagewatch.data import engines
    from stagewatch.data.sources import parse_data_args
    from stagewatch.errors import StagewatchError

    data = engines.locations(parse_data_args(args.data), parse_data_args(args.table, "--table"))
    emit = getattr(args, "emit_sql", None)
    if args.counts:
        from stagewatch.data.counts import CountsEngine

        if emit or args.save_counts:
            raise StagewatchError("--counts reads counts; it cannot be combined with --emit-sql or --save-counts",
                                  expected="one of them")
        engine: Any = CountsEngine(args.counts)
        if not data:
            data = {stage: engines.Location("counts", "") for stage in engine.stages}
        if not data:
            raise StagewatchError("name the stages the counts are for", expected="--table STAGE=NAME for each "
                                  "stage, as when the SQL was emitted")
        return engine, data
    if not data:
        raise StagewatchError("no logs given", expected="--data STAGE=PATH or --table STAGE=NAME (repeat per "
                              "stage), or --counts FILE")
    if emit:
        from stagewatch.data.counts import EmitEngine

        return EmitEngine(emit), data
    engine = engines.make(args.engine)
    if args.save_counts:
        from stagewatch.data.counts import Recorder

        engine = Recorder(engine)
    return engine, data


def _save_counts(args: argparse.Namespace, engine: Any, inputs: list[str]) -> None:
    if getattr(args, "save_counts", None):
        engine.save(args.save_counts, inputs)
        print(f"wrote {args.save_counts}: {len(engine.results)} query results", file=sys.stderr)


def _inputs(args: argparse.Namespace, data: dict[str, Any]) -> list[str]:
    """Every file the command reads: outputs may never land on one of them."""
    import glob
    import os

    files = [args.plan, *(args.counts or [])]
    for where in data.values():
        if where.kind == "data":
            files += [p for p in glob.glob(where.text) if os.path.isfile(p)] or [where.text]
    baseline = getattr(args, "baseline", None)
    if baseline:
        files.append(os.path.join(baseline, "baseline.json"))
    return files


def _guard(target: str | None, inputs: list[str]) -> None:
    """Refuse a bad output before the scan, not after it."""
    if target and target != "-":
        from stagewatch.safewrite import resolve_target

        resolve_target(target, inputs)


def _emit(text: str, output: str | None, inputs: list[str], what: str) -> None:
    """A result to its file (never over an input) or to standard output."""
    if output:
        from stagewatch import yamlio

        yamlio.write_atomic(output, text, inputs=inputs)
        print(f"wrote {output}: {what}", file=sys.stderr)
    else:
        sys.stdout.write(text)


def _calibrate(args: argparse.Namespace) -> int:
    from stagewatch.data.baseline import calibrate, load_baseline
    from stagewatch.errors import EXIT_OK

    import os

    engine, data = _engine(args)
    inputs = _inputs(args, data)
    _guard(os.path.join(args.output, "baseline.json"), inputs)
    _guard(args.save_counts, inputs)
    with _progress(len(data), engine) as step:
        lines = calibrate(args.plan, data, args.output, time_column=args.time_column, start=args.start,
                          end=args.end, progress=step, engine=engine)
    if args.thresholds:
        from stagewatch.data.baseline import add_thresholds

        with _progress(len(data), engine) as step:
            lines += add_thresholds(args.plan, args.output, data, time_column=args.time_column, progress=step,
                                    engine=engine)
    _save_counts(args, engine, inputs)
    if args.format == "openmetrics":
        from stagewatch.data.report import reference_openmetrics
        from stagewatch.plan import load_plan

        plan, _ = load_plan(args.plan)
        sys.stdout.write(reference_openmetrics(load_baseline(args.output, plan), plan))
        for line in lines:
            print(line, file=sys.stderr)
    else:
        print("\n".join(lines))
    return EXIT_OK


def _check(args: argparse.Namespace) -> int:
    from stagewatch import yamlio
    from stagewatch.data import report
    from stagewatch.data.check import exit_code, run_check
    from stagewatch.errors import EXIT_OK, StagewatchError

    engine, data = _engine(args)
    inputs = _inputs(args, data)
    _guard(args.output, inputs)
    _guard(args.save_counts, inputs)
    if args.emit_sql and not args.at:
        raise StagewatchError("--emit-sql needs --at: without the logs there is no latest timestamp",
                              expected="--at 2026-03-14T06:00Z")
    with _progress(len(data), engine) as step:
        result = run_check(args.plan, args.baseline, data, time_column=args.time_column, window=args.window,
                           at=args.at, progress=step, engine=engine)
    if args.emit_sql:
        _emit(engine.sql(), args.output, inputs, f"{len(engine.queries)} queries in {args.emit_sql} SQL")
        return EXIT_OK
    _save_counts(args, engine, inputs)
    text = None
    if args.format == "json":
        text = report.to_json(result)
    elif args.format == "markdown":
        text = report.to_markdown(result)
    elif args.format == "openmetrics":
        text = report.to_openmetrics(result, result.pipeline)
    elif args.format == "html":
        from stagewatch.data.html_report import render_check

        text = render_check(result)
    if text is None:
        if args.output:
            yamlio.write_atomic(args.output, report.to_markdown(result), inputs=inputs)
        report.print_table(result)
    else:
        _emit(text, args.output, inputs, report.summary_line(result))
    return exit_code(result)


def _replay(args: argparse.Namespace) -> int:
    from stagewatch import yamlio
    from stagewatch.data import replay_report
    from stagewatch.data.replay import exit_code, run_replay

    engine, data = _engine(args)
    inputs = _inputs(args, data)
    _guard(args.output, inputs)
    _guard(args.save_counts, inputs)
    if args.inject:
        from stagewatch.data.inject import sizes

        changes = sizes(args.inject)
        if len(changes) > 1:
            return _delay_table(args, data, changes, inputs, engine)
    with _progress(len(data), engine) as step:
        result = run_replay(args.plan, args.baseline, data, start=args.start, end=args.end, cadence=args.cadence,
                            time_column=args.time_column, injection=args.inject, progress=step, engine=engine)
    _save_counts(args, engine, inputs)
    plan = result.plan
    if args.format == "table":
        if args.output:
            yamlio.write_atomic(args.output, replay_report.to_markdown(result, plan), inputs=inputs)
        replay_report.print_table(result, plan)
    else:
        if args.format == "html":
            from stagewatch.data.html_report import render_replay

            text = render_replay(result, plan)
        else:
            text = (replay_report.to_json(result, plan) if args.format == "json"
                    else replay_report.to_markdown(result, plan))
        _emit(text, args.output, inputs, "the replay")
    return exit_code(result)


def _delay_table(args: argparse.Namespace, data: dict[str, Any], changes: list[str], inputs: list[str],
                 engine: Any) -> int:
    """``--inject`` with several sizes: replay once per size and print the detection delay of each check."""
    from stagewatch.data import replay_report
    from stagewatch.data.replay import affected, run_replay
    from stagewatch.errors import EXIT_OK

    rows = []
    for change in changes:
        with _progress(len(data), engine) as step:
            result = run_replay(args.plan, args.baseline, data, start=args.start, end=args.end, cadence=args.cadence,
                                time_column=args.time_column, injection=change, progress=step, engine=engine)
        rows.append((change, {c.id: c.detection_delay_s for c in affected(result, result.plan)}))
    text = replay_report.delay_table(rows, "json" if args.format == "json" else "markdown")
    _emit(text, args.output, inputs, "detection delay by change size")
    return EXIT_OK


def add_parsers(sub: Any) -> None:
    p = sub.add_parser("calibrate", help="make a baseline from reference logs (edges, categories, shares, rates)",
                       description="Read each stage's reference logs and write BASELINE_DIR/baseline.json: per "
                       "check the reference bin edges and shares, category frequencies, missing and unknown "
                       "shares, ranges, row counts and the item rate by hour of week. --format openmetrics also "
                       "prints the reference gauges the Prometheus export reads.")
    p.add_argument("plan", metavar="PLAN.yaml")
    _data_options(p)
    p.add_argument("--from", dest="start", metavar="T", help="start of the reference period (ISO 8601; UTC unless an offset is given)")
    p.add_argument("--to", dest="end", metavar="T", help="end of the reference period")
    p.add_argument("-o", "--output", metavar="BASELINE_DIR", required=True, help="directory to write baseline.json into")
    p.add_argument("--format", choices=("text", "openmetrics"), default="text",
                   help="openmetrics: print the reference gauges to standard output")
    p.add_argument("--thresholds", action="store_true",
                   help="also replay the reference period and store thresholds from data (for propose --baseline)")
    p.set_defaults(func=_calibrate)

    p = sub.add_parser("check", help="run the plan's input and output checks on logs against a baseline",
                       description="Compute every input and output check of the plan on the window ending at --at "
                       "(default: the latest timestamp in the data), with each check's own window unless --window "
                       "overrides it. Verdicts: ok, warn, critical, insufficient, not_measured. Exit 0 all ok, 1 a "
                       "warn, insufficient or not-measured check, 4 a critical check, 2 bad input.")
    p.add_argument("plan", metavar="PLAN.yaml")
    p.add_argument("--baseline", required=True, metavar="BASELINE_DIR")
    _data_options(p)
    p.add_argument("--window", metavar="DURATION|all", help="one window for every check; all: the whole input")
    p.add_argument("--at", metavar="T", help="end of the window (ISO 8601; default: the latest timestamp)")
    p.add_argument("--format", choices=("table", "json", "markdown", "openmetrics", "html"), default="table",
                   help="html: one self-contained page with the pipeline marked and the distributions of every "
                   "alerting check")
    p.add_argument("-o", "--output", metavar="FILE", help="write the result here (table: as Markdown)")
    from stagewatch.data import DIALECTS  # not .dialects: building the parser must not import sqlglot

    p.add_argument("--emit-sql", choices=DIALECTS, metavar="DIALECT",
                   help="write the queries of this check in a warehouse's SQL (" + ", ".join(DIALECTS) + ") "
                   "instead of running them; needs --table per stage and --at; feed the results back with --counts")
    p.set_defaults(func=_check)

    p = sub.add_parser("replay", help="how often the plan would have fired on your own history",
                       description="Run every input and output check at every evaluation time between --from and "
                       "--to, as the Prometheus export evaluates it (--cadence tumbling: once per window; 1m: every "
                       "minute over a sliding window), in one scan per stage. Reports firings, episodes and firings "
                       "per week against what the plan expects, per check and for the pipeline, and a timeline. "
                       "--inject applies a change from a time on and reports how long each check took to catch it. "
                       "Exit 1 when the replayed pages per week exceed the plan's budget.")
    p.add_argument("plan", metavar="PLAN.yaml")
    p.add_argument("--baseline", required=True, metavar="BASELINE_DIR")
    _data_options(p)
    p.add_argument("--from", dest="start", required=True, metavar="T", help="start of the period (ISO 8601)")
    p.add_argument("--to", dest="end", required=True, metavar="T", help="end of the period")
    p.add_argument("--cadence", choices=("tumbling", "1m"), default="tumbling",
                   help="tumbling (default, as the export evaluates sized checks) or 1m (sliding, every minute)")
    p.add_argument("--inject", metavar="STAGE.COLUMN=KIND:SIZE@T",
                   help="a change to apply from T: shift:SDs, scale:factor, swap:a/b, missing:share, volume:share; "
                   "several sizes (shift:0.5,1,2@T) print a table of detection delay by size")
    p.add_argument("--format", choices=("table", "json", "markdown", "html"), default="table",
                   help="html: one self-contained page with the pipeline marked and a timeline of firings per check")
    p.add_argument("-o", "--output", metavar="FILE", help="write the result here (table: as Markdown)")
    p.set_defaults(func=_replay)


def _data_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--data", action="append", metavar="STAGE=PATH",
                   help="a stage's log: a CSV, Parquet or JSON-lines file or a glob of them (repeat per stage)")
    p.add_argument("--table", action="append", metavar="STAGE=NAME",
                   help="a stage's log as a table (DB.TABLE) of the Spark catalog, or of the warehouse for "
                   "--emit-sql (repeat per stage)")
    p.add_argument("--time-column", default="timestamp", metavar="NAME", help="the timestamp column (default: timestamp)")
    p.add_argument("--engine", choices=("duckdb", "spark"), default="duckdb",
                   help="where rows become counts: duckdb (embedded, default) or spark (the SparkSession your "
                   "configuration or spark-submit gives; pip install 'stagewatch[spark]')")
    p.add_argument("--counts", action="append", metavar="FILE",
                   help="read the counts instead of the logs: a file written by --save-counts, or the results of "
                   "emitted SQL (CSV or JSON rows; stagewatch schema counts); repeatable")
    p.add_argument("--save-counts", metavar="FILE",
                   help="also write every count the engine produced, for --counts later")
