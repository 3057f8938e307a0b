"""The review part of the interview: accept, reject (with a note) or edit the proposal, layer by layer."""

from __future__ import annotations

from typing import Any

from stagewatch.interview import LAYERS, Question, Session
from stagewatch.interview_answers import _duration, _optional_number


def _table(metrics: list[dict[str, Any]]) -> list[str]:
    rows = [("metric", "window", "warn", "critical", "why")]
    for m in metrics:
        rows.append((m["id"].split(".", 2)[2], m["window"], _th(m.get("warn")), _th(m.get("critical")),
                     (m.get("why") or "")[:70]))
    widths = [max(len(r[i]) for r in rows) for i in range(4)]
    return ["    " + "  ".join(r[i].ljust(widths[i]) for i in range(4)) + "  " + r[4] for r in rows]


def _th(value: Any) -> str:
    return "-" if value is None else f"{value:g}"


def review(s: Session, plan: dict[str, Any], stages: list[str]) -> None:
    """Accept, reject (with a note) or edit the proposal, stage by stage and layer by layer, then the metrics of
    the whole pipeline."""
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
            choice = s.ask(Question(key, f"{stage_id}, {layer} metrics: what now?",
                                    "Accepted metrics are exported as they are; rejected ones need a note saying "
                                    "why; 'later' leaves them proposed for code review.", "select",
                                    ["accept all", "choose one by one", "later"], default="accept all"))
            if choice == "later":
                continue
            if choice == "accept all":
                for m in metrics:
                    m["status"] = "accepted"
                continue
            names = [m["id"] for m in metrics]
            keep = s.ask(Question(f"{key}.accepted", "Untick the metrics to reject",
                                  "Ticked: accepted. Unticked: rejected, and you will say why.", "checkbox", names,
                                  default=names))
            for m in metrics:
                if m["id"] in keep:
                    m["status"] = "accepted"
                else:
                    m["status"] = "rejected"
                    m["note"] = s.ask(Question(f"review.{m['id']}.note", f"Why reject {m['id']}?",
                                               "The note stays in the plan so reviewers know it was a decision.",
                                               validate=lambda v: None if str(v or "").strip() else
                                               "a rejection needs a reason"))
            edit = s.ask(Question(f"{key}.edit", "Tick any metric whose window or thresholds you want to change",
                                  "The plan will re-derive the sizing for your numbers.", "checkbox",
                                  [n for n in names if n in keep], default=[]))
            for m in metrics:
                if m["id"] not in edit:
                    continue
                m["window"] = s.ask(Question(f"edit.{m['id']}.window", f"{m['id']}: window", "e.g. 15m, 1h, 1d",
                                             default=m["window"], validate=_duration))
                for level in ("warn", "critical"):
                    m[level] = s.ask(Question(f"edit.{m['id']}.{level}", f"{m['id']}: {level} threshold "
                                              f"({m.get('unit', '')}, blank for none)", "", default=m.get(level),
                                              convert=_optional_number))
                m.pop("fingerprint", None)


def restore_gaps(plan: dict[str, Any], findings: list[Any]) -> None:
    """Put rejected metrics behind a coverage finding back to proposed, so the gap is open for review again."""
    for f in findings:
        subject = f.subject or ""
        for stage in plan["stages"]:
            for m in stage["metrics"]:
                hit = (f.code == "coverage-layer" and stage["id"] == subject) or (
                    f.code == "coverage-edge" and m.get("edge") and f"{m['edge']['from']}->{m['edge']['to']}" == subject)
                if hit and m["status"] == "rejected" and not (m.get("note") or "").strip():
                    m["status"] = "proposed"
