"""`explain`: the derivation of one metric's window and thresholds, in words."""

from __future__ import annotations

import re
from typing import Any

from stagewatch import wording
from stagewatch.errors import StagewatchError
from stagewatch.escape import terminal
from stagewatch.plan import all_metrics, fingerprint


def find_metric(plan: dict[str, Any], metric_id: str, path: str) -> dict[str, Any]:
    metrics = {m["id"]: m for m in all_metrics(plan) + plan.get("retired_metrics", [])}
    if metric_id in metrics:
        return metrics[metric_id]
    close = wording.closest(metric_id, metrics, n=5)
    hint = ("did you mean " + ", ".join(close) + "?") if close else "an id such as " + next(iter(metrics), "?")
    raise StagewatchError(f"no metric {wording.quote(metric_id)} in this plan", file=path, expected=hint)


def explain(plan: dict[str, Any], metric_id: str, path: str) -> str:
    m = find_metric(plan, metric_id, path)
    sizing = m.get("sizing") or {}
    lines = [f"{m['id']}  ({m['layer']} metric, {m['status']}, from {m.get('source', 'manual')})",
             f"  measures:  {m.get('measure', '')}",
             f"  statistic: {m['statistic']} ({m.get('unit', '')}), direction {m['direction']}",
             f"  window:    {m['window']} against reference {m.get('reference', '')}",
             f"  warn:      {_th(m.get('warn'))}    critical: {_th(m.get('critical'))} -> {m['severity']}",
             f"  catches:   {', '.join(m.get('catches', []))}",
             f"  why:       {m.get('why', '')}"]
    for key, label in (("samples_per_window", "samples per window"), ("reference_samples", "reference samples"),
                       ("evaluations_per_week", "evaluations per week"), ("alpha", "alpha per evaluation"),
                       ("noise_floor", "noise floor"), ("detectable_change", "change the alert catches"),
                       ("detectable_at_floor", "change passing the floor"),
                       ("power", "power"), ("expected_false_alarms_per_week", "expected false alarms/week"),
                       ("evaluation", "evaluated"), ("evaluation_lag", "evaluated after"),
                       ("detection_delay", "change seen within")):
        if key in sizing:
            lines.append(f"  {label + ':':29}{sizing[key]}")
    for pair in sizing.get("burn_rate_alerts", []):
        lines.append(f"  {pair['severity']:6} when burn rate > {pair['burn_rate']} over {pair['long_window']} and "
                     f"{pair['short_window']} ({pair['budget_consumed']:.0%} of the error budget)")
    if sizing.get("derivation"):
        lines.append("")
        lines.append("  " + _derivation(m, sizing["derivation"]))
    if m.get("review"):
        lines.append("")
        lines.append(f"  review: {m['review']}")
    if m.get("note"):
        lines.append(f"  note:   {m['note']}")
    return terminal("\n".join(lines))  # escape codes and bidi overrides in a plan's text are shown, not obeyed


def _derivation(m: dict[str, Any], text: str) -> str:
    """The sizing's derivation, told for what the metric is now.

    A metric carries a fingerprint of its editable fields while it is as proposed. Without one it has reviewer
    edits (or was written by hand), and propose keeps its numbers as the reviewer left them: its critical threshold
    is the one set in review, no longer a suggestion. A fingerprint that no longer matches means an edit since the
    last propose, so the derivation describes the numbers before it.
    """
    if "fingerprint" not in m:
        return re.sub(r"The suggested critical threshold (\S+) is", r"The critical threshold \1, set in review, is",
                      text)
    if m["fingerprint"] != fingerprint(m):
        return (text + " The metric was edited after this was worked out, so these figures describe the numbers "
                "before the edit: `stagewatch propose` sizes the edited ones again.")
    return text


def _th(value: Any) -> str:
    return "none" if value is None else f"{value:g}"
