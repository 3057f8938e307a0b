"""A neutral JSON check configuration: one entry per check, for `stagewatch check` and for other schedulers."""

from __future__ import annotations

import json
from typing import Any, Sequence

from stagewatch.safewrite import STDOUT, safe_write
from stagewatch.exporters import live_metrics
from stagewatch.yamlio import schema_errors

CHECKS_VERSION = 1


def checks_document(plan: dict[str, Any]) -> dict[str, Any]:
    checks = []
    for m in live_metrics(plan):
        stage, layer, name = m["id"].split(".", 2)
        sizing = m.get("sizing") or {}
        entry: dict[str, Any] = {
            "id": m["id"], "stage": stage, "layer": layer, "name": name, "status": m["status"],
            "measure": m.get("measure", ""), "field": m.get("field"), "edge": m.get("edge"),
            "statistic": m["statistic"], "params": m.get("params") or {}, "window": m["window"],
            "reference": m.get("reference"), "warn": m.get("warn"), "critical": m.get("critical"),
            "direction": m["direction"], "severity": m["severity"], "catches": m.get("catches", []),
            "evaluation_lag": sizing.get("evaluation_lag"), "alpha": sizing.get("alpha"),
            "noise_floor": sizing.get("noise_floor"), "source": m.get("source"),
        }
        checks.append({k: v for k, v in entry.items() if v is not None})
    return {"checks_version": CHECKS_VERSION, "pipeline": plan["pipeline"], "checks": checks}


def export_checks(plan: dict[str, Any], target: str, inputs: Sequence[str] = (), force: bool = False) -> list[str]:
    """Write the check configuration to ``target`` (``-``: standard output): one file, named by the user, so
    there is no directory of generated files to keep (``force`` is accepted for a uniform call)."""
    document = checks_document(plan)
    errors = schema_errors(document, "checks")
    if errors:  # our own output must meet our own schema
        raise AssertionError(f"checks export breaks its schema: {errors[0].message}")
    safe_write(target, json.dumps(document, indent=2) + "\n", inputs=inputs)
    if target == STDOUT:
        return []
    return [f"wrote {target}: {len(document['checks'])} checks (JSON, schema: `stagewatch schema checks`)"]
