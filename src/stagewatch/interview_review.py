"""The review part of the interview: accept, reject (with a note) or edit the proposal, layer by layer."""

from __future__ import annotations

import copy
from typing import Any, Callable

from stagewatch import durations
from stagewatch.interview import LAYERS, Session
from stagewatch.interview_answers import _duration
from stagewatch.interview_keys import EDIT, NOTE, PICK, REVIEW
from stagewatch.lint import LIVE, ordered
from stagewatch.plan import all_metrics


def _table(metrics: list[dict[str, Any]]) -> list[str]:
    rows = [("metric", "window", "warn", "critical", "why")]
    for m in metrics:
        rows.append((m["id"].split(".", 2)[2], m["window"], _th(m.get("warn")), _th(m.get("critical")),
                     (m.get("why") or "")[:70]))
    widths = [max(len(r[i]) for r in rows) for i in range(4)]
    return ["    " + "  ".join(r[i].ljust(widths[i]) for i in range(4)) + "  " + r[4] for r in rows]


def _th(value: Any) -> str:
    return "-" if value is None else f"{value:g}"


def review(s: Session, plan: dict[str, Any], stages: list[str],
           resize: Callable[[dict[str, Any]], dict[str, Any]] | None = None) -> None:
    """Accept, reject (with a note) or edit the proposal, stage by stage and layer by layer, then the metrics of
    the whole pipeline. ``resize`` recomposes a plan (for the noise floor of an edited window)."""
    by_id = {st["id"]: st["metrics"] for st in plan["stages"]}
    blocks = [(stage_id, by_id[stage_id]) for stage_id in stages] + [("pipeline", plan.get("pipeline_metrics", []))]
    for stage_id, block in blocks:
        for layer in LAYERS:
            metrics = [m for m in block if m["layer"] == layer and m["status"] == "proposed"]
            if not metrics:
                continue
            s.out(f"{stage_id}: {len(metrics)} proposed {layer} metrics")
            for line in _table(metrics):
                s.out(line)
            key = f"review.{stage_id}.{layer}"
            choice = s.ask(REVIEW.question(key, f"{stage_id}, {layer} metrics: what now?",
                                           "Accepted metrics are exported as they are; rejected ones need a note "
                                           "saying why; 'later' leaves them proposed for code review.",
                                           default="accept all"))
            if choice == "later":
                continue
            if choice == "accept all":
                for m in metrics:
                    m["status"] = "accepted"
                continue
            names = [m["id"] for m in metrics]
            keep = s.ask(PICK.question(f"{key}.accepted", "Untick the metrics to reject",
                                       "Ticked: accepted. Unticked: rejected, and you will say why.", default=names,
                                       choices=names))
            for m in metrics:
                if m["id"] in keep:
                    m["status"] = "accepted"
                else:
                    m["status"] = "rejected"
                    m["note"] = s.ask(NOTE.question(f"review.{m['id']}.note", f"Why reject {m['id']}?",
                                                    "The note stays in the plan so reviewers know it was a "
                                                    "decision."))
            kept = [n for n in names if n in keep]
            edit = s.ask(PICK.question(f"{key}.edit", "Tick any metric whose window or thresholds you want to change",
                                       "The plan will re-derive the sizing for your numbers.", default=[],
                                       choices=kept))
            for m in metrics:
                if m["id"] in edit:
                    _edit(s, plan, m, resize)


def _edit(s: Session, plan: dict[str, Any], m: dict[str, Any],
          resize: Callable[[dict[str, Any]], dict[str, Any]] | None) -> None:
    """A new window and thresholds for one metric, each checked as lint would check it: a window that fits in its
    reference, warn before critical in the check's direction, a size of change never negative, at least one level,
    and a critical threshold above the noise floor of the window."""
    mid = m["id"]
    m["window"] = s.ask(EDIT["window"].question(f"edit.{mid}.window", f"{mid}: window", "e.g. 15m, 1h, 1d",
                                                default=m["window"], validate=_window_fits(m)))
    m.pop("fingerprint", None)
    m["warn"] = s.ask(EDIT["warn"].question(f"edit.{mid}.warn", f"{mid}: warn threshold ({m.get('unit', '')}, "
                                            "blank for none)", "", default=m.get("warn"),
                                            validate=_level_ok(m, None, None)))
    floor = None
    if resize is not None and m["statistic"] != "level":
        trial = resize(copy.deepcopy(plan))
        sized = next((t for t in all_metrics(trial) if t["id"] == mid), {})
        floor = (sized.get("sizing") or {}).get("noise_floor")
    m["critical"] = s.ask(EDIT["critical"].question(f"edit.{mid}.critical", f"{mid}: critical threshold "
                                                    f"({m.get('unit', '')}, blank for none)", "",
                                                    default=m.get("critical"),
                                                    validate=_level_ok(m, m["warn"], floor)))


def _window_fits(m: dict[str, Any]) -> Callable[[Any], str | None]:
    def check(value: Any) -> str | None:
        problem = _duration(value)
        if problem:
            return problem
        reference = m.get("reference")
        if isinstance(reference, str) and durations.is_duration(reference) and (
                durations.parse(reference) < durations.parse(value)):
            return f"the window must fit in the reference ({reference})"
        return None

    return check


def _level_ok(m: dict[str, Any], warn: float | None, floor: float | None) -> Callable[[Any], str | None]:
    """The check of a warn (``floor`` None, no warn to compare) or of a critical threshold."""
    critical = warn is not None or floor is not None

    def check(value: Any) -> str | None:
        if value is None:
            if critical and warn is None and m["status"] in LIVE:
                return "give a warn or a critical threshold: a metric without either can never alert"
            return None
        if not isinstance(value, (int, float)) or abs(value) > 1e12:
            return "must be a number within ±1e12"
        if m["statistic"] != "level" and value < 0:
            return f"a {m['statistic']} threshold is a size of change: 0 or more (the direction says which way)"
        if warn is not None and not ordered(warn, value, m["direction"], m["statistic"]):
            return f"warn {warn:g} must come before critical {value:g} for direction '{m['direction']}'"
        if floor is not None and m["status"] in LIVE and abs(value) < floor:
            return f"below the noise floor {floor:g} at window {m['window']}: it would fire on noise"
        return None

    return check
