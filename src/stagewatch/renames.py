"""Renames: a stage or field that carries ``renamed_from`` takes its reviewed metrics along.

Before the merge, the plan on disk is rewritten as if it had always used the new names: metric ids (the owner,
and the old name inside names such as ``from_<stage>_contract`` or ``<field>_drift``), hand-off ends, folded
roles, the columns a check reads, and the stage name inside generated text. A metric nobody edited gets a new
fingerprint, so it is still refreshed; an edited one keeps every edit under its new id. Reviewer notes are the
reviewer's words and are left as written.
"""

from __future__ import annotations

import copy
import re
from typing import Any, Callable

from stagewatch.spec import Pipeline


def _token(old: str) -> re.Pattern[str]:
    """``old`` as a whole part of an underscore-joined name (``from_frame_gate_drift`` holds ``frame_gate``)."""
    return re.compile(rf"(?:(?<=_)|^){re.escape(old)}(?=_|$)")


def _word(old: str) -> re.Pattern[str]:
    return re.compile(rf"(?<![A-Za-z0-9_]){re.escape(old)}(?![A-Za-z0-9_])")


def stage_map(pipeline: Pipeline) -> dict[str, str]:
    return {s.renamed_from: s.id for s in pipeline.stages if s.renamed_from}


def field_map(pipeline: Pipeline) -> dict[str, dict[str, str]]:
    """Per stage (new id), its renamed fields: old name -> new name."""
    out: dict[str, dict[str, str]] = {}
    for s in pipeline.stages:
        for f in (*s.inputs, *s.outputs):
            if f.renamed_from:
                out.setdefault(s.id, {})[f.renamed_from] = f.name
    return out


def _metric_id(metric_id: str, stages: dict[str, str], fields: dict[str, dict[str, str]]) -> str:
    owner, layer, name = metric_id.split(".", 2)
    for old, new in stages.items():
        name = _token(old).sub(new, name)
    owner = stages.get(owner, owner)
    for old, new in fields.get(owner, {}).items():
        name = _token(old).sub(new, name)
    return f"{owner}.{layer}.{name}"


def _reads(reads: dict[str, Any], log_stage: str, stages: dict[str, str],
           fields: dict[str, dict[str, str]]) -> dict[str, Any]:
    out = dict(reads)
    if "stage" in out:
        out["stage"] = stages.get(out["stage"], out["stage"])
    names = fields.get(stages.get(log_stage, log_stage), {})
    if not names:
        return out
    for key in ("column", "other_column"):
        if key in out:
            column = out[key]
            for old, new in names.items():
                column = _token(old).sub(new, column)
            out[key] = column
    if "columns" in out:
        out["columns"] = [names.get(c, c) for c in out["columns"]]
    if "ranges" in out:
        out["ranges"] = {names.get(c, c): r for c, r in out["ranges"].items()}
    return out


def _metric(metric: dict[str, Any], stages: dict[str, str], fields: dict[str, dict[str, str]]) -> dict[str, Any]:
    out = copy.deepcopy(metric)
    owner = metric["id"].split(".", 1)[0]
    out["id"] = _metric_id(metric["id"], stages, fields)
    if isinstance(out.get("edge"), dict):
        out["edge"] = {**out["edge"], "from": stages.get(out["edge"]["from"], out["edge"]["from"]),
                       "to": stages.get(out["edge"]["to"], out["edge"]["to"])}
    for role in out.get("serves", []):
        role["metric"] = _metric_id(role["metric"], stages, fields)
        if role.get("edge"):
            role["edge"] = {**role["edge"], "from": stages.get(role["edge"]["from"], role["edge"]["from"]),
                            "to": stages.get(role["edge"]["to"], role["edge"]["to"])}
    if out.get("field"):
        out["field"] = fields.get(stages.get(owner, owner), {}).get(out["field"], out["field"])
    if isinstance(out.get("reads"), dict):
        out["reads"] = _reads(out["reads"], owner, stages, fields)
    for key in ("measure", "why"):
        if isinstance(out.get(key), str):
            for old, new in stages.items():
                out[key] = _word(old).sub(new, out[key])
    return out


def metric_ids(existing: dict[str, Any] | None, pipeline: Pipeline) -> dict[str, str]:
    """Old id -> new id of every metric (and stage) a rename moves."""
    stages, fields = stage_map(pipeline), field_map(pipeline)
    if not existing or not (stages or fields):
        return {}
    out = {old: new for old, new in stages.items()}
    for metric in _all(existing):
        new = _metric_id(metric["id"], stages, fields)
        if new != metric["id"]:
            out[metric["id"]] = new
    return out


def _all(plan: dict[str, Any]) -> list[dict[str, Any]]:
    return ([m for s in plan.get("stages", []) for m in s.get("metrics", [])]
            + list(plan.get("pipeline_metrics", [])) + list(plan.get("retired_metrics", [])))


def apply(existing: dict[str, Any], pipeline: Pipeline, fingerprint: Callable[[dict[str, Any]], str]
          ) -> dict[str, Any]:
    """A copy of the plan on disk rewritten to the new names (the plan itself when nothing was renamed)."""
    stages, fields = stage_map(pipeline), field_map(pipeline)
    if not (stages or fields):
        return existing
    plan = copy.deepcopy(existing)

    def move(metrics: list[dict[str, Any]]) -> list[dict[str, Any]]:
        moved = []
        for metric in metrics:
            untouched = metric.get("fingerprint") == fingerprint(metric)
            new = _metric(metric, stages, fields)
            if untouched and "fingerprint" in new:
                new["fingerprint"] = fingerprint(new)
            moved.append(new)
        return moved

    for stage in plan.get("stages", []):
        stage["id"] = stages.get(stage["id"], stage["id"])
        stage["metrics"] = move(stage.get("metrics", []))
    plan["pipeline_metrics"] = move(plan.get("pipeline_metrics", []))
    if plan.get("retired_metrics"):
        plan["retired_metrics"] = move(plan["retired_metrics"])
    return plan
