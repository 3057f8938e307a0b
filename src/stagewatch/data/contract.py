"""The log contract: which columns of a stage's log each input and output check reads.

A stage's log is a table with one row per item: a timestamp column and one column per declared input and output
field, named as declared. A catalog rule's ``reads`` template names what its metric reads, with placeholders that
are filled here from the pipeline description:

``{field}``     the declared field the rule was repeated for
``{output}``    the stage's output column: its first declared output field, else a name by output type
``{handoff}``   on a hand-off, the producer's output column (the consumer's log carries it under the same name)
``{inputs}``    in ``columns``: every declared input field of the stage
``{series}``    the first numeric input field of a time-series stage (else ``value``)
``{text}``      the text a stage receives: the output column of the nearest upstream stage that writes text, through
                stages that pass items on unchanged (else ``text``), so that the stage's own text checks and the
                consumer side of the hand-off read one column and fold into one check
``{sink}``      the last stage of the pipeline (for whole-pipeline metrics)

Nothing here reads data; :func:`reads_for` runs at ``propose`` time and the plan stores the result.
"""

from __future__ import annotations

import copy
from typing import Any

from stagewatch.spec import FieldSpec, Pipeline, Stage

# Output column of a stage that declares no output field, by its output type. A gate logs whether it passed the
# item on; a source of records logs an item id.
DEFAULT_OUTPUT_COLUMN = {
    "gate": "passed", "records": "record_id", "score": "score", "class": "predicted_class",
    "attribute": "attribute", "value": "predicted_value", "text": "output_text", "ranking": "ranking",
    "segments": "segments",
}
DEFAULT_UNKNOWN = "unknown"
TIME_COLUMN = "timestamp"
SERVICE = "service"


def output_column(stage: Stage) -> str:
    return stage.outputs[0].name if stage.outputs else DEFAULT_OUTPUT_COLUMN.get(stage.output, "output")


def passes_on(stage: Stage) -> bool:
    """Whether a stage passes its items on unchanged (a gate, a source of records, with no declared outputs)."""
    return not stage.outputs and stage.output in ("gate", "records")


def handoff_column(stage: Stage) -> str:
    """What a stage hands to the next one, as the consumer logs it: its output column, or the item id when the
    stage passes items on unchanged (a gate, a source of records)."""
    if passes_on(stage):
        return "record_id"
    return output_column(stage)


def handoff_columns(stage: Stage, consumer: Stage | None) -> list[str]:
    """The columns ``consumer`` logs of what it receives from ``stage``: for a stage that passes items on unchanged,
    the fields both declare (a load cell's weight), else the item id; for any other stage, its output column."""
    if passes_on(stage):
        shared = [f.name for f in stage.inputs if consumer and any(c.name == f.name for c in consumer.inputs)]
        return shared or ["record_id"]
    return [handoff_column(stage)]


def _series(stage: Stage) -> str:
    numeric = [f.name for f in stage.inputs if f.type == "numeric"]
    return numeric[0] if numeric else "value"


def received_text(stage: Stage, stages: dict[str, Stage]) -> str:
    """The column of ``stage``'s log holding the text it receives (see ``{text}`` above)."""
    queue, seen = list(stage.upstream), set()
    while queue:
        up = stages.get(queue.pop(0))
        if up is None or up.id in seen:
            continue
        seen.add(up.id)
        if up.output == "text":
            return handoff_column(up)
        if passes_on(up):
            queue.extend(up.upstream)
    return "text"


def _declared(stages: list[Stage], column: str) -> FieldSpec | None:
    """The declared field named ``column`` among these stages' inputs and outputs, first match."""
    for stage in stages:
        for spec in (*stage.outputs, *stage.inputs):
            if spec.name == column:
                return spec
    return None


def reads_for(template: dict[str, Any] | None, *, owner: Stage | None, pipeline: Pipeline, sinks: list[str],
              name: str, field: FieldSpec | None = None, edge: tuple[str, str] | None = None,
              stages: dict[str, Stage] | None = None) -> dict[str, Any] | None:
    """The concrete ``reads`` of one metric from its rule's template (``None`` when the rule has none);
    ``stages`` is the pipeline's stages by id, when the caller has it already."""
    if template is None:
        return None
    stages = stages if stages is not None else {s.id: s for s in pipeline.stages}
    reads = copy.deepcopy(template)
    if reads.get("measured_in") == SERVICE:
        return reads
    if "{sink}" in str(reads.get("stage", "")):
        if not sinks:
            return {"measured_in": SERVICE}
        reads["stage"] = sinks[0]
    log_stage = stages.get(reads.get("stage", "")) or owner
    if log_stage is None:
        return {"measured_in": SERVICE}
    producer = stages[edge[0]] if edge else log_stage
    values = {
        "field": field.name if field else "",
        "output": output_column(log_stage),
        "handoff": handoff_column(producer),
        "series": _series(log_stage),
        "text": received_text(log_stage, stages),
    }
    valueless = log_stage if "{output}" in str(reads.get("column")) else producer
    if ("{output}" in str(reads.get("column")) or "{handoff}" in str(reads.get("column"))) \
            and passes_on(valueless) and reads.get("condition") not in ("invalid", "missing", "rows"):
        return {"measured_in": SERVICE}  # an item id has no distribution to watch
    for key in ("column", "other_column"):
        if key in reads:
            reads[key] = reads[key].format(**values)
    if "columns" in reads:
        columns: list[str] = []
        for item in reads["columns"]:
            if item == "{inputs}":
                columns.extend(f.name for f in log_stage.inputs)
            elif item == "{handoff}":
                columns.extend(handoff_columns(producer, log_stage))
            else:
                columns.append(item.format(**values))
        reads["columns"] = columns
    # Where to look up a column's declared range and unknown value: the log's stage, then the producer.
    look = [log_stage, producer]
    condition = reads.get("condition")
    if condition == "invalid":
        if not reads["columns"]:
            # Nothing declared to validate: the stage logs its own verdict in a flag column named after the check.
            return {"column": name, "condition": "set"}
        ranges = {c: list(spec.range) for c in reads["columns"]
                  if (spec := _declared(look, c)) is not None and spec.range}
        if ranges:
            reads["ranges"] = ranges
    if condition == "out_of_range":
        spec = field or _declared(look, reads["column"])
        if spec is None or not spec.range:
            return {"measured_in": SERVICE}
        reads["range"] = list(spec.range)
    if condition == "unknown":
        spec = field or _declared(look, reads["column"])
        unknown = spec.unknown_value if spec is not None and spec.unknown_value is not None else DEFAULT_UNKNOWN
        reads["unknown_value"] = str(unknown)
    return reads


def columns_of(reads: dict[str, Any]) -> list[str]:
    """Every log column a check reads, in a stable order (the timestamp column aside)."""
    out: list[str] = []
    for key in ("column", "other_column"):
        if reads.get(key):
            out.append(reads[key])
    out.extend(reads.get("columns", []))
    return list(dict.fromkeys(out))


def in_log(metric: dict[str, Any]) -> bool:
    """Whether ``check`` computes this metric from a log (input and output checks with a ``reads`` key)."""
    reads = metric.get("reads") or {}
    return bool(reads) and reads.get("measured_in", "log") != SERVICE and metric.get("layer") in ("input", "output")


def log_columns(plan: dict[str, Any]) -> dict[str, list[str]]:
    """Per stage, the columns its log must carry for every live check (what instrumentation.md lists)."""
    out: dict[str, list[str]] = {}
    metrics = [(s["id"], m) for s in plan.get("stages", []) for m in s.get("metrics", [])]
    metrics += [("pipeline", m) for m in plan.get("pipeline_metrics", [])]
    for owner, metric in metrics:
        if metric.get("status") in ("rejected", "stale") or not in_log(metric):
            continue
        stage = metric["reads"].get("stage", owner)
        out.setdefault(stage, [])
        for column in columns_of(metric["reads"]):
            if column not in out[stage]:
                out[stage].append(column)
    return out


def live(metric: dict[str, Any]) -> bool:
    return metric.get("status") not in ("rejected", "stale")


def checks_by_stage(plan: dict[str, Any]) -> dict[str, list[dict[str, Any]]]:
    """Per log (stage id), the live metrics computed from it, in plan order."""
    out: dict[str, list[dict[str, Any]]] = {}
    metrics = [(s["id"], m) for s in plan.get("stages", []) for m in s.get("metrics", [])]
    metrics += [(None, m) for m in plan.get("pipeline_metrics", [])]
    for owner, metric in metrics:
        if not live(metric) or not in_log(metric):
            continue
        stage = metric["reads"].get("stage", owner)
        if stage:
            out.setdefault(stage, []).append(metric)
    return out


def signature(metric: dict[str, Any]) -> str:
    """What a baseline's reference of a check depends on; a change to any of it makes the reference stale."""
    import hashlib
    import json

    payload = {k: metric.get(k) for k in ("reads", "statistic", "params")}
    return hashlib.sha256(json.dumps(payload, sort_keys=True, default=str).encode()).hexdigest()[:16]


def _kind_of(metric: dict[str, Any], column: str) -> str:
    reads = metric["reads"]
    condition = reads.get("condition")
    if column == reads.get("other_column"):
        return "label (empty until it arrives)"
    if condition == "set":
        return "flag (true/false)"
    if reads.get("transform") == "length":
        return "text"
    if metric["statistic"] == "chi_square" or condition in ("unknown", "unseen"):
        return "category"
    if metric["statistic"] in ("psi", "ks", "mean", "quantile") or condition in ("out_of_range", "nonfinite"):
        return "number"
    return "any (checked for presence and range)"


def log_columns_markdown(plan: dict[str, Any]) -> str:
    """The "log columns" section of instrumentation.md: per stage, the columns its log carries for `check`."""
    from stagewatch.escape import markdown_code as cell

    lines = ["", "## Log columns", "",
             f"`stagewatch calibrate` and `stagewatch check` read one log per stage: a table with one row per item, "
             f"a `{TIME_COLUMN}` column (ISO 8601; UTC unless it carries an offset; `--time-column` names another) "
             "and the columns below, named as declared. CSV, Parquet or JSON lines; a glob may name many files.", ""]
    by_stage = checks_by_stage(plan)
    for stage, metrics in by_stage.items():
        uses: dict[str, list[str]] = {}
        kinds: dict[str, str] = {}
        for metric in metrics:
            for column in columns_of(metric["reads"]):
                uses.setdefault(column, []).append(metric["id"])
                kinds.setdefault(column, _kind_of(metric, column))
        lines += [f"### {cell(stage)}", "", "| column | holds | read by |", "|---|---|---|"]
        lines.append(f"| {cell(TIME_COLUMN)} | when the item passed the stage | every check |")
        for column, ids in uses.items():
            lines.append(f"| {cell(column)} | {kinds[column]} | {', '.join(cell(i) for i in ids)} |")
        rows_only = [m["id"] for m in metrics if not columns_of(m["reads"])]
        if rows_only:
            lines.append(f"| (rows) | one row per item | {', '.join(cell(i) for i in rows_only)} |")
        lines.append("")
    return "\n".join(lines) + "\n"


def check_stages(plan: dict[str, Any], data: dict[str, str], plan_path: str) -> None:
    """Refuse a ``--data STAGE=PATH`` whose stage the plan does not have."""
    from stagewatch.errors import StagewatchError

    known = {s["id"] for s in plan["stages"]}
    for stage in data:
        if stage not in known:
            raise StagewatchError(f"--data names stage '{stage}', which the plan does not have", file=plan_path,
                                  expected="one of " + ", ".join(sorted(known)))
