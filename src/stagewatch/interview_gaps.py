"""The end of the interview: metrics whose rule no longer applies, then whatever lint would still find, each with
the fix for it. The interview never writes a plan that lint rejects: a finding left unfixed stops it."""

from __future__ import annotations

from typing import Any

from stagewatch import fold, yamlio
from stagewatch.errors import StagewatchError
from stagewatch.interview import Session
from stagewatch.interview_keys import CONFIRM
from stagewatch.lint import Finding, lint_document
from stagewatch.plan import all_metrics, compose
from stagewatch.spec import Pipeline

# Findings about one metric's own numbers: the fix is the proposal's numbers.
_NUMBERS = ("threshold-order", "threshold-missing", "window", "below-noise-floor", "burn-rate")
_COVERAGE = ("coverage-layer", "coverage-edge", "ml-test-score")


def close(s: Session, plan: dict[str, Any], pipeline: Pipeline, path: str) -> dict[str, Any]:
    """Decide on stale metrics, then offer the fix for each finding lint would report; returns the plan."""
    _stale(s, plan)
    findings = lint_document(yamlio.Document(path, plan, None))
    if not findings:
        return plan
    fresh = {m["id"]: m for m in all_metrics(compose(pipeline))}
    metrics = {m["id"]: m for m in all_metrics(plan)}
    firsts = {later["id"]: first["id"] for first, later in fold.duplicates(metrics.values())}
    fixes = [(f, _fix(f, plan, metrics, fresh, firsts)) for f in findings]
    s.out("lint would reject the plan as it stands:")
    for finding, (words, _) in fixes:
        s.out(f"  [{finding.code}] {finding.message}")
        s.out(f"      fix: {words}")
    if s.ask(CONFIRM.question("gaps.fix", "Apply these fixes?", "Each fix is the smallest change that makes the "
                              "plan pass lint; without them the plan is not written.", default=True)):
        for _, (_, apply) in fixes:
            apply()
        plan = compose(pipeline, existing=plan)
    left = lint_document(yamlio.Document(path, plan, None))
    if left:
        raise StagewatchError("the plan was not written: lint would reject it: "
                              + "; ".join(f"[{f.code}] {f.message}" for f in left[:5]),
                              expected="answers that pass lint, or 'gaps.fix: true' to apply the fixes offered")
    return plan


def _stale(s: Session, plan: dict[str, Any]) -> None:
    undecided = [m["id"] for m in all_metrics(plan) if m["status"] == "stale"
                 and m.get("previous_status", "proposed") == "proposed" and not m.get("note")]
    if undecided:
        s.out(f"{len(undecided)} metric(s) no longer apply and nobody decided on them: " + ", ".join(undecided))
        if s.ask(CONFIRM.question("gaps.drop_stale", "Remove them from the plan? (no: keep them as manual metrics)",
                                  "They came from rules that no longer match your stages; nothing a person wrote "
                                  "is in them.", default=True)):
            drop(plan, set(undecided))
    for m in [m for m in all_metrics(plan) if m["status"] == "stale" and m["id"] not in undecided]:
        if s.ask(CONFIRM.question(f"gaps.stale.{m['id']}", f"{m['id']} no longer applies (it was "
                                  f"{m.get('previous_status', 'proposed')}). Remove it? (no: keep it as a manual "
                                  "metric)", "Its rule no longer matches the stage; a manual metric stays until you "
                                  "delete it.", default=True)):
            drop(plan, {m["id"]})
    for m in all_metrics(plan):
        if m["status"] == "stale":
            _manual(m)


def _manual(m: dict[str, Any]) -> None:
    m["source"] = "manual"
    m["status"] = m.pop("previous_status", "proposed")
    m.pop("review", None)
    m.pop("fingerprint", None)


def drop(plan: dict[str, Any], ids: set[str]) -> None:
    for stage in plan["stages"]:
        stage["metrics"] = [m for m in stage["metrics"] if m["id"] not in ids]
    for key in ("pipeline_metrics", "retired_metrics"):
        if key in plan:
            plan[key] = [m for m in plan[key] if m["id"] not in ids]


def _fix(finding: Finding, plan: dict[str, Any], metrics: dict[str, dict[str, Any]], fresh: dict[str, dict[str, Any]],
         firsts: dict[str, str]) -> tuple[str, Any]:
    """(the fix in words, a function that applies it) for one finding; ``metrics`` are the plan's by id, ``firsts``
    the check each later one of a duplicate pair repeats (``fold.duplicates``)."""
    subject = finding.subject or ""
    if finding.code in _NUMBERS and subject in metrics:
        if subject in fresh:
            return (f"restore the proposed window and thresholds of {subject}",
                    lambda: _restore(metrics[subject], fresh[subject]))
        return f"remove the manual metric {subject}", lambda: drop(plan, {subject})
    if finding.code == "budget":
        edited = [m for m in metrics.values() if "fingerprint" not in m and m["id"] in fresh
                  and (m.get("warn"), m.get("critical")) != (fresh[m["id"]].get("warn"), fresh[m["id"]].get("critical"))]
        targets = edited or [m for m in metrics.values() if m["id"] in fresh]

        def restore_all() -> None:
            for m in targets:
                _restore(m, fresh[m["id"]])
        return ("restore the proposed thresholds of " + (", ".join(m["id"] for m in edited) or "every metric"),
                restore_all)
    if finding.code == "duplicate-signal" and subject in metrics:
        first = firsts.get(subject, "another check")

        def reject() -> None:
            metrics[subject]["status"] = "rejected"
            metrics[subject]["note"] = f"reads the same signal as {first}"
        return f"reject {subject} with the note 'reads the same signal as {first}'", reject
    if finding.code == "stale" and subject in metrics:
        return f"keep {subject} as a manual metric", lambda: _manual(metrics[subject])
    if finding.code in _COVERAGE:
        behind = [m for m in _owned(plan, finding) if m["status"] == "rejected"]
        if behind:
            def reopen() -> None:
                for m in behind:
                    m["status"] = "proposed"
            return "reopen for review the rejected metrics behind it: " + ", ".join(m["id"] for m in behind), reopen
    return "none known: change the answers behind it", lambda: None


def _owned(plan: dict[str, Any], finding: Finding) -> list[dict[str, Any]]:
    """The metrics a coverage finding is about: its stage's, or those on the hand-off it names."""
    subject = finding.subject or ""
    out = []
    for stage in plan["stages"]:
        for m in stage["metrics"]:
            if (finding.code != "coverage-edge" and stage["id"] == subject) or (
                    m.get("edge") and f"{m['edge']['from']}->{m['edge']['to']}" == subject):
                out.append(m)
    return out


def _restore(metric: dict[str, Any], proposed: dict[str, Any]) -> None:
    for key in ("window", "reference", "warn", "critical"):
        if key in proposed:
            metric[key] = proposed[key]
