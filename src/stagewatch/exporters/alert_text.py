"""The words and labels an exported alert carries: its routing and inhibition labels, its summary, why, first
response and, for label-based checks, when labelled items are counted."""

from __future__ import annotations

import re
from typing import Any

from stagewatch.exporters.alertmanager import LINEAGE_LABEL, explains_drift, is_drift

FIRST_RESPONSE = {
    "software": "Check the stage's recent deploys, its dependencies and its resource use; roll back if a change "
                "lines up with the start.",
    "input": "Look at the upstream stage's output alerts first (the same statistic is checked on both sides of "
             "the hand-off); if upstream is quiet, look for a change in the source: new sensor, supplier, client.",
    "output": "Compare with this stage's input alerts: if inputs moved too, follow them upstream; if not, the "
              "stage itself changed (model, rules, configuration) or the world did (concept drift).",
}
# Where data enters the pipeline there is no upstream stage to look at first.
FIRST_RESPONSE_AT_ENTRY = {
    **FIRST_RESPONSE,
    "input": "Data enters the pipeline here, so no stage above can explain it: look for a change in the source "
             "itself (a new or moved sensor, a new supplier or client, a changed export) or in the world it measures.",
    "output": "Data enters the pipeline here: if its input checks moved too, the source changed; if not, look at "
              "how this stage records or forwards what it receives (firmware, configuration, a new release).",
}


def inert(text: Any) -> str:
    """Free text for an annotation, on one line, as Prometheus shows it after expanding the template."""
    return re.sub(r"\s+", " ", str(text or "")).strip()


def fmt(x: float) -> str:
    return f"{x:.10g}"


def alert_labels(metric: dict[str, Any], owner: str | None, level: str, severity: str,
            lineage: str | None = None) -> dict[str, str]:
    drift = is_drift(metric)
    labels: dict[str, str] = {"severity": severity, "level": level, "layer": metric["layer"],
                              "drift": "true" if drift else "false",
                              "explains": "true" if explains_drift(metric) else "false"}
    if owner:
        labels["owner"] = owner
    if drift and lineage:  # what an upstream alert matches to hold this one back (alertmanager.Lineage)
        labels[LINEAGE_LABEL] = lineage
    return labels


LABEL_COUNTING = ("counts labelled items when their label arrives, not when the prediction is made: a change in "
                  "predictions shows here one label delay later")


def alert_annotations(metric: dict[str, Any], level: str, threshold: float, stage_info: dict[str, Any]) -> dict[str, str]:
    first = FIRST_RESPONSE_AT_ENTRY if stage_info and not stage_info.get("upstream") else FIRST_RESPONSE
    out = {
        "summary": inert(f"{metric['id']}: {metric.get('measure', '')} beyond {level} threshold "
                          f"{fmt(threshold)} ({metric.get('unit', '')}) over {metric['window']}"),
        "description": inert(metric.get("why", "")),
        "first_response": inert(first[metric["layer"]]),
        "plan_metric": metric["id"],
    }
    if metric.get("on_labels"):
        lag = (metric.get("sizing") or {}).get("evaluation_lag")
        out["counting"] = inert(LABEL_COUNTING + (f" ({lag})" if lag else ""))
    return out
