"""The questions about one stage: what it is, what feeds it, its volume, the fields to watch, and the settings the
plan's windows and quality checks depend on (serving, batch period, change rate, latency SLO, labels)."""

from __future__ import annotations

import functools
from typing import Any, Callable

from stagewatch import spec, yamlio
from stagewatch.errors import StagewatchError
from stagewatch.interview_answers import FIELD_TYPES, _fields_text, _name_validator
from stagewatch.interview_keys import STAGE

STRUCTURED = ("tabular", "events", "timeseries")
# Keys of the settings behind "Keep the usual settings?": an answers file that gives one of them means "no".
DETAIL_KEYS = ("serving", "run_every", "change_rate", "latency_slo_ms", "labels", "label_delay", "labelled_share")
DEFAULT_RUN_EVERY = "1d"


def _default_output(kind: str) -> str:
    return {"learned": "class", "rule-based": "gate", "source": "records"}[kind]


def ask_stage(s: Any, index: int, total: int | None, head: dict[str, Any], earlier: list[dict[str, Any]],
              current: dict[str, Any] | None = None, prefix: str | None = None) -> dict[str, Any]:
    """Questions for one stage. A typical stage takes 8 questions when the defaults are accepted."""
    cur = current or {}
    key = prefix or f"stages.{index}"
    s.out(f"-- stage {index + 1} of {total} --" if total else f"-- stage {index + 1} --")
    taken = {st["id"] for st in earlier}
    previous = earlier[-1] if earlier else {}
    stage: dict[str, Any] = {}
    stage["id"] = s.ask(STAGE["id"].question(f"{key}.id", "Stage id", "Short name used in metric ids, e.g. "
                                             "frame_gate.", default=cur.get("id", f"stage_{index + 1}"),
                                             validate=_name_validator(taken)))
    stage["kind"] = s.ask(STAGE["kind"].question(
        f"{key}.kind", "What kind of stage is it?", "learned: a trained model; rule-based: fixed logic such as a "
        "gate or a filter; source: where data enters (sensor, feed, log).",
        default=cur.get("kind", "source" if not earlier else "learned")))
    stage["modality"] = s.ask(STAGE["modality"].question(
        f"{key}.modality", "What does it take in?", "The modality of its input decides the input metrics "
        "(brightness for images, length for text ...).",
        default=cur.get("modality", previous.get("modality", "tabular"))))
    stage["output"] = s.ask(STAGE["output"].question(
        f"{key}.output", "What does it put out?", "gate: passes on, drops or clips its input; attribute: a category "
        "that may be unknown; the output kind decides the output metrics.",
        default=cur.get("output", _default_output(stage["kind"]))))
    if earlier:
        names = [st["id"] for st in earlier]
        stage["upstream"] = s.ask(STAGE["upstream"].question(
            f"{key}.upstream", "Which stages feed it? (space to pick, enter to confirm)",
            "Each hand-off gets the same check on both sides, so a shift can be placed before or after it.",
            default=cur.get("upstream", [names[-1]] if stage["kind"] != "source" else []), choices=names))
    else:
        stage["upstream"] = []
    stage["volume_per_hour"] = s.ask(STAGE["volume_per_hour"].question(
        f"{key}.volume_per_hour", "Items per hour at a typical hour",
        "Sets how many samples a window holds, hence how short a window can be and still be trusted.",
        default=cur.get("volume_per_hour", previous.get("volume_per_hour", 1000))))
    if stage["modality"] in STRUCTURED:
        fields = s.ask(STAGE["inputs"].question(
            f"{key}.inputs", "Input fields to watch, as name:type, comma separated (blank for none)",
            "Each field gets its own drift, missing-share and range checks; types: " + ", ".join(FIELD_TYPES)
            + ". Ranges and categories can be added in the YAML later.",
            default=_fields_text(cur.get("inputs", []))))
        if fields:
            stage["inputs"] = _kept(fields, cur.get("inputs", []))
    outputs = s.ask(STAGE["outputs"].question(
        f"{key}.outputs", "Output fields to watch, as name:type, comma separated (blank for none)",
        "A numeric output field gets a drift check of its own, and its name is the log column checks read; "
        "types: " + ", ".join(FIELD_TYPES) + ". An unknown_value can be added in the YAML later.",
        default=_fields_text(cur.get("outputs", [])), validate=_outputs_fit(head, earlier, stage)))
    if outputs:
        stage["outputs"] = _kept(outputs, cur.get("outputs", []))
    _settings(s, key, stage, head, cur, previous)
    for extra in ("description", "owner", "slo_target", "slo_period"):
        if extra in cur:
            stage[extra] = cur[extra]
    return stage


def _settings(s: Any, key: str, stage: dict[str, Any], head: dict[str, Any], cur: dict[str, Any],
              previous: dict[str, Any]) -> None:
    """Serving, batch period, change rate, latency SLO and labels: offered as one summary to keep, or asked."""
    serving = cur.get("serving", previous.get("serving", "online"))
    # a stage being revised keeps what its description said (a batch stage may have no period)
    run_every = cur.get("run_every") if cur else previous.get("run_every", DEFAULT_RUN_EVERY)
    change_rate = cur.get("change_rate", _change_rate(serving, run_every, head))
    learned = stage["kind"] == "learned"
    can_use_labels = stage["output"] in labelled_outputs()
    labels = cur.get("labels", "delayed" if learned and can_use_labels else "none")
    label_delay = cur.get("label_delay", spec.DEFAULT_LABEL_DELAY)
    labelled_share = cur.get("labelled_share", 1)
    latency = cur.get("latency_slo_ms")
    summary = f"serving {serving}" + (f" every {run_every}" if serving == "batch" and run_every else "")
    summary += f", data changes within {change_rate}"
    if learned:
        summary += f", labels {labels}" + (f" after {label_delay}" if labels == "delayed" else "")
        if labels != "none":
            summary += ", every output labelled" if labelled_share == 1 else f", {labelled_share:g} of outputs labelled"
    if latency and serving == "online":
        summary += f", latency SLO {latency:g} ms"
    given = any(f"{key}.{k}" in s.known for k in DETAIL_KEYS)
    keep = s.ask(STAGE["keep_defaults"].question(
        f"{key}.keep_defaults", f"Keep the usual settings ({summary})?",
        "Say no to set serving, batch period, change rate, latency SLO and labels yourself.", default=not given))
    if not keep:
        serving = s.ask(STAGE["serving"].question(
            f"{key}.serving", "How is it served?", "online: answers requests; batch: runs on a schedule; device: runs "
            "on users' or machines' devices. Decides the software metrics.", default=serving))
        if serving == "batch":
            run_every = s.ask(STAGE["run_every"].question(
                f"{key}.run_every", "How often does it run? (e.g. 1h, 1d)",
                "Windows are whole runs: a check of a daily batch looks at one or more days.",
                default=run_every or DEFAULT_RUN_EVERY))
        change_rate = s.ask(STAGE["change_rate"].question(
            f"{key}.change_rate", "How fast can its input change?", "A retuned machine or new supplier changes "
            "data in minutes; a large user base over months. The window must be shorter than this.",
            default=cur.get("change_rate", _change_rate(serving, run_every, head))))
        if serving == "online":
            latency = s.ask(STAGE["latency_slo_ms"].question(
                f"{key}.latency_slo_ms", "Latency SLO in ms (blank for none)",
                "With an SLO you get burn-rate alerts on slow requests.",
                default=latency if latency is not None else ""))
        if learned:
            labels = s.ask(STAGE["labels"].question(
                f"{key}.labels", "Do its predictions get ground-truth labels?",
                "With labels the plan watches quality itself; without, a proxy.", default=labels,
                validate=None if can_use_labels else _no_label_check(stage["output"])))
            if labels == "delayed":
                label_delay = s.ask(STAGE["label_delay"].question(
                    f"{key}.label_delay", "How long until labels arrive? (e.g. 3d)",
                    "Quality windows are evaluated this long after they close.", default=label_delay))
            if labels != "none":
                labelled_share = s.ask(STAGE["labelled_share"].question(
                    f"{key}.labelled_share", "What share of its outputs ever gets a label? (1 for all)",
                    "Quality checks count labelled items only: a small share needs longer windows.",
                    default=labelled_share))
    stage["serving"] = serving
    if serving == "batch" and run_every:
        stage["run_every"] = run_every
    stage["change_rate"] = change_rate
    if serving == "online" and latency:
        stage["latency_slo_ms"] = latency
    if learned:
        stage["labels"] = labels
        if labels == "delayed":
            stage["label_delay"] = label_delay
        if labels != "none" and labelled_share != 1:
            stage["labelled_share"] = labelled_share


def _change_rate(serving: str, run_every: str | None, head: dict[str, Any]) -> str:
    """The description's own default: a batch stage's data moves once a run, others by who produces the data."""
    batch = spec.batch_change_rate(run_every) if serving == "batch" else None
    return batch or spec.DEFAULT_CHANGE_RATE[head["context"]]


def _kept(fields: list[dict[str, Any]], before: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Keep what the YAML said about a field (range, categories ...) when its type stays."""
    old = {f["name"]: f for f in before}
    return [{**old[f["name"]], **f} if f["name"] in old and old[f["name"]]["type"] == f["type"] else f
            for f in fields]


def _outputs_fit(head: dict[str, Any], earlier: list[dict[str, Any]],
                 stage: dict[str, Any]) -> Callable[[Any], str | None]:
    """Output field names that the catalog can use: a field whose metric id a rule already proposes for this
    stage (a numeric field 'value' on a value output) is refused at the prompt, not when the plan is composed."""
    def check(fields: Any) -> str | None:
        if not fields:
            return None
        from stagewatch.catalog import load_catalog, match
        from stagewatch.graph import PipelineGraph

        trial = {"serving": "online", **stage, "outputs": fields}
        description = {**head, "stages": [*earlier, trial]}
        try:
            pipeline = spec.from_document(yamlio.Document("<interview>", description, None))
            match(load_catalog(), pipeline, PipelineGraph.build(pipeline))
        except StagewatchError as exc:
            return exc.message
        return None

    return check


@functools.lru_cache(maxsize=1)
def labelled_outputs() -> frozenset[str]:
    """Outputs whose labels a catalog quality check reads (the ML Test Score's check 7 with labels)."""
    from stagewatch.catalog import load_catalog

    out: set[str] = set()
    for rule in load_catalog():
        if rule.scope == "stage" and "labels" in rule.when and set(rule.when["labels"]) - {"none"} and any(
                7 in m.get("ml_test_score", []) for m in rule.metrics):
            out.update(rule.when.get("output", []))
    return frozenset(out)


def _no_label_check(output: str) -> Callable[[Any], str | None]:
    def check(value: Any) -> str | None:
        if value == "none":
            return None
        return (f"no quality check reads labels of a '{output}' output yet: answer none, and the plan watches "
                "agreement with a shadow model instead")

    return check
