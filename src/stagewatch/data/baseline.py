"""``stagewatch calibrate``: a baseline from reference logs, and reading it back with its integrity checked.

A baseline is one JSON file, ``baseline.json`` in its directory: per stage the sources (paths, rows, content
hashes), the reference period, the item rate (by hour of week when the period spans a week), a summary per
column read, and per check its reference (edges, categories, moments) with the reference's own counts. The body
carries a SHA-256 of itself, so an edited or truncated file is refused rather than trusted.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from typing import Any, Callable

from stagewatch import __version__, yamlio
from stagewatch.data import contract, scan, sources
from stagewatch.data.measures import MAX_CATEGORIES_SEEN, Measure
from stagewatch.errors import StagewatchError

FORMAT = 1
FILE = "baseline.json"
HOURS_PER_WEEK = 168
# The epoch (1970-01-01) was a Thursday: add three days of hours so that hour 0 of the week is Monday 00:00 UTC.
_MONDAY_OFFSET_H = 72


def hour_of_week(epoch_hour: int) -> int:
    return (epoch_hour + _MONDAY_OFFSET_H) % HOURS_PER_WEEK


def _canonical(body: dict[str, Any]) -> str:
    return json.dumps(body, sort_keys=True, separators=(",", ":"), allow_nan=False)


def _clean(x: Any) -> Any:
    """JSON has no NaN or infinity: store them as null."""
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, dict):
        return {k: _clean(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_clean(v) for v in x]
    return x


def plan_identity(plan: dict[str, Any]) -> dict[str, Any]:
    return {"pipeline": plan.get("pipeline"), "plan_version": plan.get("plan_version")}


def _rates(hours: dict[int, int], first_h: int, last_h: int) -> dict[str, Any]:
    span = last_h - first_h + 1
    total = sum(hours.values())
    out: dict[str, Any] = {"hours": span, "rows": total, "rate_per_hour": total / span if span else 0.0,
                           "rate_by_hour_of_week": None}
    if span >= HOURS_PER_WEEK:
        sums = [0.0] * HOURS_PER_WEEK
        seen = [0] * HOURS_PER_WEEK
        for h in range(first_h, last_h + 1):
            sums[hour_of_week(h)] += hours.get(h, 0)
            seen[hour_of_week(h)] += 1
        out["rate_by_hour_of_week"] = [round(s / c, 3) if c else None for s, c in zip(sums, seen)]
    return out


def _calibrate_stage(engine: Any, source: sources.Source, metrics: list[dict[str, Any]], start: float | None,
                     end: float | None) -> dict[str, Any]:
    first, last, rows_all, bad_ts = scan.time_range(engine, source)
    if rows_all and bad_ts == rows_all:
        raise StagewatchError(f"no value in column '{source.time_column}' reads as a time", file=source.pattern,
                              expected="ISO 8601 timestamps such as 2026-03-01T06:00:00Z")
    lo = start if start is not None else (first - 1 if first is not None else None)
    hi = end if end is not None else last
    hours = scan.hourly(engine, source, lo, hi)
    if not hours:
        raise StagewatchError("no rows in the reference period", file=source.pattern,
                              expected="logs whose timestamps fall between --from and --to")
    first_h = int(math.floor(lo / 3600)) if start is not None and lo is not None else min(hours)
    last_h = int(math.ceil(hi / 3600)) - 1 if end is not None and hi is not None else max(hours)
    numeric_columns = {c for c in source.columns if source.is_numeric(c)}
    measures: dict[str, Measure] = {}
    missing: dict[str, list[str]] = {}
    for metric in metrics:
        measure = Measure(metric, numeric_columns)
        absent = [c for c in measure.columns() if not source.has(c)]
        if absent:
            missing[metric["id"]] = absent
        else:
            measures[metric["id"]] = measure
    numeric: dict[str, Any] = {}
    categorical: list[str] = []
    for m in measures.values():
        if m.is_categorical():
            categorical.append(m.column)  # type: ignore[arg-type]
        elif m.probabilities() or m.statistic == "mean":
            key = f"{m.column}|{m.reads.get('transform', '')}|{m.metric['id']}"
            numeric[key] = (m.value_expr(), m.probabilities())
    prof = scan.profile(engine, source, numeric, sorted(set(categorical)), lo, hi, MAX_CATEGORIES_SEEN)
    references: dict[str, dict[str, Any]] = {}
    aggregates = []
    for metric_id, m in measures.items():
        if m.is_categorical():
            p = {"categories": prof[f"categories:{m.column}"]}
        elif m.probabilities() or m.statistic == "mean":
            p = prof[f"{m.column}|{m.reads.get('transform', '')}|{metric_id}"]
        else:
            p = {}
        ref = m.reference(p)
        references[metric_id] = ref
        aggregates += [a.renamed(f"{metric_id}#{a.key}") for a in m.aggregates(ref)]
    counts = scan.run(engine, source, aggregates, start=lo, end=hi).get(-1, {})
    checks: dict[str, Any] = {}
    for metric_id, m in measures.items():
        own = {k.split("#", 1)[1]: v for k, v in counts.items() if k.startswith(metric_id + "#")}
        block = m.reference_from_counts(references[metric_id], own)
        block["signature"] = contract.signature(m.metric)
        checks[metric_id] = block
    rates = _rates(hours, first_h, last_h)
    summary = {}
    for key, p in prof.items():
        if key.startswith("categories:"):
            summary[key.split(":", 1)[1]] = {"categories": [c for c, _ in p[:20]], "distinct": len(p)}
        else:
            column = key.split("|", 1)[0]
            summary.setdefault(column, {"min": p["min"], "max": p["max"], "mean": p["mean"], "sd": p["sd"],
                                        "values": p["n"]})
    return {
        "sources": source.describe(),
        "time_column": source.time_column,
        "column_types": dict(source.columns),
        "period": {"from": sources.format_time(first_h * 3600.0), "to": sources.format_time((last_h + 1) * 3600.0)},
        "rows_unreadable_time": bad_ts,
        **rates,
        "columns": summary,
        "checks": checks,
        "not_calibrated": {k: f"the log has no column {', '.join(v)}" for k, v in missing.items()},
    }


def calibrate(plan_path: str, data: dict[str, Any], out_dir: str, *, time_column: str = contract.TIME_COLUMN,
              start: str | None = None, end: str | None = None,
              progress: Callable[[str], None] | None = None, engine: Any = None) -> list[str]:
    """Write ``out_dir/baseline.json`` from the reference logs (``data``: stage to path or
    :class:`~stagewatch.data.engines.Location`) on ``engine`` (default DuckDB); returns the lines to print."""
    from stagewatch.data import engines
    from stagewatch.plan import load_plan

    plan, _ = load_plan(plan_path)
    by_stage = contract.checks_by_stage(plan)
    contract.check_stages(plan, data, plan_path)
    lo, hi = sources.parse_period(start, end)
    engine = engine or engines.make("duckdb")
    stages: dict[str, Any] = {}
    lines = []
    for index, (stage, where) in enumerate(engines.normal(data).items()):
        if progress:
            progress(stage)
        source = engine.open(stage, where, time_column, index)
        block = _calibrate_stage(engine, source, by_stage.get(stage, []), lo, hi)
        stages[stage] = block
        lines.append(f"{stage}: {block['rows']:,} rows over {block['hours']:,} hours, "
                     f"{len(block['checks'])} check(s) calibrated"
                     + (f", {len(block['not_calibrated'])} not (missing columns)" if block["not_calibrated"] else ""))
    missing_stages = sorted(set(by_stage) - set(data))
    body = _clean({
        "format": FORMAT,
        "tool": f"stagewatch {__version__}",
        "plan": {**plan_identity(plan), "file": os.path.basename(plan_path)},
        "period": {"from": start, "to": end},
        "stages": stages,
    })
    path = os.path.join(out_dir, FILE)
    _write(path, body)
    lines.append(f"wrote {path}")
    if missing_stages:
        lines.append("no --data for " + ", ".join(missing_stages) + ": their checks have no baseline")
    return lines


def _write(path: str, body: dict[str, Any]) -> None:
    text = json.dumps({"sha256": hashlib.sha256(_canonical(body).encode()).hexdigest(), "baseline": body},
                      indent=1, sort_keys=True, allow_nan=False) + "\n"
    yamlio.write_atomic(path, text)


def add_thresholds(plan_path: str, out_dir: str, data: dict[str, Any], *, time_column: str,
                   progress: Callable[[str], None] | None = None, engine: Any = None) -> list[str]:
    """Replay the reference period against its own baseline and store data-based thresholds in the baseline."""
    from stagewatch.data.replay import run_replay
    from stagewatch.data.thresholds import fit
    from stagewatch.plan import load_plan
    from stagewatch.sizing import number

    plan, _ = load_plan(plan_path)
    path = os.path.join(out_dir, FILE)
    body = load_baseline(out_dir, plan)
    starts = [s["period"]["from"] for s in body["stages"].values()]
    ends = [s["period"]["to"] for s in body["stages"].values()]
    start, end = min(starts), max(ends)
    result = run_replay(plan_path, out_dir, data, start=start, end=end, time_column=time_column, progress=progress,
                        engine=engine)
    metrics = {m["id"]: m for ms in contract.checks_by_stage(plan).values() for m in ms}
    found: dict[str, Any] = {}
    lo = sources.parse_time(start, "--from") or 0.0
    for c in result.checks:
        if c.id not in metrics:  # a sequential rule beside its check: its limit comes from the run length
            continue
        metric = metrics[c.id]
        ref = body["stages"][c.stage]["checks"][c.id]
        sizing = metric.get("sizing") or {}
        alphas = {"critical": sizing.get("alpha"), "warn": sizing.get("warn_alpha")}
        fitted = fit(metric, ref, c.values, c.samples, c.reference_samples, c.times, lo,
                     {k: (None if v is None else number(v)) for k, v in alphas.items()})
        if fitted:
            fitted["signature"] = contract.signature(metric)
            found[c.id] = _clean(fitted)
    body["thresholds"] = {"period": {"from": start, "to": end}, "cadence": result.cadence, "checks": found}
    _write(path, body)
    return [f"thresholds from data for {len(found)} check(s): {start} to {end}, whole days resampled "
            f"({max((f['blocks'] for f in found.values()), default=0)} days)"]


def load_baseline(directory: str, plan: dict[str, Any]) -> dict[str, Any]:
    """The baseline body, after checking its hash and that it was made for this plan's pipeline."""
    path = os.path.join(directory, FILE) if os.path.isdir(directory) else directory
    # --baseline names the directory calibrate wrote; its baseline.json is taken too. Any other file (a plan, a
    # log) is a mix-up of arguments, not a damaged baseline.
    other_file = not os.path.isdir(directory) and os.path.basename(directory) != FILE
    mixed_up = StagewatchError("a file where a baseline directory is expected", file=path,
                               expected=f"a directory written by `stagewatch calibrate`, such as baseline/, which "
                               f"holds {FILE}")
    try:
        with open(path, encoding="utf-8") as handle:
            raw = json.load(handle)
    except FileNotFoundError:
        raise StagewatchError("no baseline here", file=path, expected="a directory written by `stagewatch calibrate`") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        if other_file:
            raise mixed_up from None
        raise StagewatchError(f"the baseline is not valid JSON (truncated or edited?): {exc}", file=path,
                              expected="a baseline written by `stagewatch calibrate`; re-run it") from None
    if not isinstance(raw, dict) or "baseline" not in raw or "sha256" not in raw:
        if other_file:
            raise mixed_up
        raise StagewatchError("this is not a stagewatch baseline", file=path,
                              expected="a baseline written by `stagewatch calibrate`")
    body = raw["baseline"]
    if hashlib.sha256(_canonical(body).encode()).hexdigest() != raw["sha256"]:
        raise StagewatchError("the baseline's content does not match its hash: it was edited or damaged", file=path,
                              expected="an unedited baseline; re-run `stagewatch calibrate`")
    if body.get("format") != FORMAT:
        raise StagewatchError(f"baseline format {body.get('format')} is not {FORMAT}", file=path,
                              expected="a baseline from this version; re-run `stagewatch calibrate`")
    made_for = body.get("plan", {}).get("pipeline")
    if made_for != plan.get("pipeline"):
        raise StagewatchError(f"this baseline was made for pipeline '{made_for}', not '{plan.get('pipeline')}'",
                              file=path, expected="a baseline calibrated on this plan")
    return body


def load_thresholds(directory: str, pipeline: str) -> dict[str, Any]:
    """The thresholds from data of a baseline (``calibrate --thresholds``), for ``propose --baseline``."""
    body = load_baseline(directory, {"pipeline": pipeline})
    found = body.get("thresholds")
    if not found:
        raise StagewatchError("this baseline has no thresholds from data", file=os.path.join(directory, FILE),
                              expected="a baseline written by `stagewatch calibrate ... --thresholds`")
    return found
