"""The plan: compose it from a pipeline and the catalog, merge it with a plan people already edited, write it.

Reviewer intent lives in fields (``status``, ``note``, thresholds, windows); comments are kept too (see
``comments.py``) but the tool reads no meaning into them. Each generated
metric carries a ``fingerprint`` of the fields people edit; when a re-run finds the fingerprint unchanged, nobody
touched the metric and it is refreshed, otherwise the human version wins and only its ``sizing`` is recomputed.
"""

from __future__ import annotations

import copy
import hashlib
import json
from dataclasses import dataclass
from typing import Any

from stagewatch import durations, fold, renames, sizing, stats, yamlio
from stagewatch.data import contract
from stagewatch.catalog import PIPELINE_OWNER, Proposal, Rule, load_catalog, match
from stagewatch.errors import StagewatchError
from stagewatch.fanout import fan_out
from stagewatch.graph import PipelineGraph
from stagewatch.names import first_collision
from stagewatch.spec import Pipeline

PLAN_VERSION = 1
HEADER = ("# stagewatch plan: edit status, note, window and thresholds in review; re-run `stagewatch propose` to "
          "merge.\n# Schema: `stagewatch schema plan` prints it (JSON Schema 2020-12).\n")
STATUSES = ("proposed", "accepted", "rejected", "stale")
# Fields a reviewer edits; the fingerprint covers exactly these.
EDITABLE = ("status", "measure", "statistic", "params", "unit", "window", "reference", "warn", "critical",
            "direction", "severity", "catches", "why", "note")
METRIC_KEYS = ("id", "layer", "status", "previous_status", "source", "measure", "field", "edge", "serves", "reads", "sequential", "statistic",
               "params", "unit", "window", "reference", "warn", "critical", "direction", "severity", "catches",
               "why", "ml_test_score", "on_labels", "review", "note", "sizing", "fingerprint")


def fingerprint(metric: dict[str, Any]) -> str:
    fields = {k: metric.get(k) for k in EDITABLE}
    for key in ("reads", "sequential"):  # keys added later: plans without them keep their fingerprints
        if key in metric:
            fields[key] = metric[key]
    payload = json.dumps(fields, sort_keys=True, default=str)
    return hashlib.sha256(payload.encode()).hexdigest()[:12]


def _resolve(value: Any, change_rate: str) -> Any:
    if isinstance(value, dict) and "by_change_rate" in value:
        return value["by_change_rate"][change_rate]
    return value


@dataclass
class _Context:
    pipeline: Pipeline
    graph: PipelineGraph

    def __post_init__(self) -> None:
        self.stages = {s.id: s for s in self.pipeline.stages}

    def traffic(self, owner: str, edge: tuple[str, str] | None, quality: bool) -> sizing.Traffic:
        stages = self.stages
        if owner == PIPELINE_OWNER:
            sinks = [stages[s] for s in self.graph.sinks]
            rates = [s.change_rate for s in self.pipeline.stages]
            fastest = min(rates, key=list(sizing.CHANGE_RATE_WINDOWS).index)
            if quality:
                labelled = [s for s in sinks if s.labels != "none"]
                delays = [durations.parse(s.label_delay) for s in labelled if s.label_delay]
                return sizing.Traffic(sum(s.labelled_per_hour for s in labelled), fastest,
                                      durations.format(max(delays)) if delays else None)
            # What reaches the end: end-to-end latency and the final output are counted where items leave the
            # pipeline (summing the sources would count one fruit once per camera frame and once per weighing).
            return sizing.Traffic(sum(s.volume_per_hour for s in sinks), fastest, run_every=_slowest_run(sinks))
        stage = stages[edge[0]] if edge else stages[owner]
        # A check is judged on whole runs of the stage whose log it reads: the consumer's side of a hand-off is
        # read in the consumer's log, so a batch consumer's runs set its windows, whatever the producer's pace.
        run_every = stages[owner].run_every if owner in stages else stage.run_every
        if quality:
            return sizing.Traffic(stage.labelled_per_hour, stage.change_rate, stage.label_delay,
                                  run_every=run_every)
        per_hour = stage.volume_per_hour
        if edge and owner == edge[1] and owner in stages:
            # The consumer's side is read in the consumer's log, which holds no more rows than the consumer
            # handles: an aggregating stage (a carton planner) logs its 45 cartons an hour, not the 2,000 fruit.
            per_hour = min(per_hour, stages[owner].volume_per_hour)
        return sizing.Traffic(per_hour, stage.change_rate, None, stage.slo_target, stage.slo_period,
                              stage.latency_slo_ms, run_every)


def _slowest_run(stages: list[Any]) -> str | None:
    """The longest ``run_every`` among stages that all run in batches (None when any of them runs continuously)."""
    runs = [s.run_every for s in stages]
    if not runs or any(r is None for r in runs):
        return None
    return max(runs, key=durations.parse)


def _is_quality(metric: dict[str, Any]) -> bool:
    return bool(metric.get("on_labels"))


def _draft(proposal: Proposal, change_rate: str) -> dict[str, Any]:
    t = proposal.template
    metric: dict[str, Any] = {
        "id": proposal.id,
        "layer": t["layer"],
        "status": "proposed",
        "source": proposal.rule.id,
        "measure": proposal.text("measure"),
    }
    if proposal.field is not None:
        metric["field"] = proposal.field.name
    if proposal.edge is not None:
        metric["edge"] = {"from": proposal.edge[0], "to": proposal.edge[1], "side": proposal.side}
    metric["statistic"] = t["statistic"]
    if t.get("params"):
        metric["params"] = dict(t["params"])
    metric["unit"] = t.get("unit") or _unit(t["statistic"], t.get("params"))
    metric["window"] = t.get("window", "auto")
    metric["reference"] = t.get("reference", "28d")
    metric["warn"] = _resolve(t.get("warn"), change_rate)
    metric["critical"] = _resolve(t.get("critical"), change_rate)
    metric["direction"] = t["direction"]
    metric["severity"] = t["severity"]
    metric["catches"] = list(t["catches"])
    metric["why"] = proposal.text("why")
    if t.get("ml_test_score"):
        metric["ml_test_score"] = list(t["ml_test_score"])
    if t.get("on_labels"):
        metric["on_labels"] = True
    return metric


def _unit(statistic: str, params: dict[str, Any] | None) -> str:
    if statistic == stats.BURN_RATE:
        return "burn rate"
    return stats.make(statistic, **(params or {})).unit


def _order(metric: dict[str, Any]) -> dict[str, Any]:
    out = {k: metric[k] for k in METRIC_KEYS if k in metric and metric[k] is not None}
    for k in ("warn", "critical"):  # keep both keys visible, null means "no such level"
        out.setdefault(k, None)
    ordered = {k: out[k] for k in METRIC_KEYS if k in out}
    ordered.update({k: v for k, v in metric.items() if k not in ordered and not k.startswith("_")
                    and v is not None})
    return ordered


def _sizing_input(metric: dict[str, Any], traffic: sizing.Traffic) -> dict[str, Any]:
    """What sizing reads of one metric: the metric under its id as name, with the label delay of a quality check."""
    work = dict(metric)
    work["name"] = metric["id"]
    if traffic.label_delay and _is_quality(metric):
        work["_label_delay"] = traffic.label_delay
    return work


def _sized(job: tuple[dict[str, Any], sizing.Traffic, sizing.Budget]) -> dict[str, Any]:
    return sizing.size_metric(*job)


def _shares_tails(job: tuple[dict[str, Any], sizing.Traffic, sizing.Budget]) -> tuple[Any, ...]:
    """Checks on the same traffic compute the same window and reference sizes, so many of the same tail sums:
    size them in one process."""
    traffic = job[1]
    return traffic.per_hour, traffic.change_rate, traffic.run_every


def _store_sizing(metric: dict[str, Any], result: dict[str, Any], refresh: bool) -> None:
    """Fill window, thresholds and the sizing block; ``refresh=False`` keeps the metric's own window/thresholds."""
    if not refresh and metric.get("window") == "auto":
        refresh = True  # a reviewer wrote "auto": size this metric again (thresholds included)
    metric["review"] = result["review"]
    metric["sizing"] = result["sizing"]
    if not refresh:
        return  # a reviewer's numbers stand; sizing only explains them (and flags them for review)
    metric["window"] = result["window"]
    metric["reference"] = result.get("reference", metric["reference"])
    metric["warn"] = result["warn"]
    metric["critical"] = result["critical"]


def compose(pipeline: Pipeline, rules: list[Rule] | None = None, existing: dict[str, Any] | None = None,
            data_thresholds: dict[str, Any] | None = None) -> dict[str, Any]:
    """The plan for ``pipeline``; with ``existing`` (a loaded plan), merged so that no human edit is lost."""
    graph = PipelineGraph.build(pipeline)
    rules = rules if rules is not None else load_catalog()
    context = _Context(pipeline, graph)
    stages = {s.id: s for s in pipeline.stages}
    fresh: dict[str, dict[str, Any]] = {}
    traffic_of: dict[str, sizing.Traffic] = {}
    sinks = graph.sinks
    for proposal in match(rules, pipeline, graph):
        traffic = context.traffic(proposal.owner, proposal.edge, bool(proposal.template.get("on_labels")))
        draft = _draft(proposal, traffic.change_rate)  # labelled or not, the change rate is the stage's
        reads = contract.reads_for(proposal.template.get("reads"), owner=stages.get(proposal.owner),
                                   pipeline=pipeline, sinks=sinks, name=proposal.name,
                                   field=proposal.field, edge=proposal.edge, stages=stages)
        if reads:
            draft["reads"] = reads
        fresh[draft["id"]] = draft
        traffic_of[draft["id"]] = traffic
    fresh, folded = fold.fold(fresh)
    if existing:
        existing = renames.apply(existing, pipeline, fingerprint)
    old = _existing_metrics(existing) if existing else {}
    merged: dict[str, dict[str, Any]] = {}
    kept: set[str] = set()
    for metric_id, draft in fresh.items():
        before = old.get(metric_id)
        if before is None or before.get("fingerprint") == fingerprint(before):
            merged[metric_id] = draft
        else:
            metric = copy.deepcopy(before)
            if metric.get("status") == "stale":  # its rule applies again
                metric["status"] = metric.pop("previous_status", "proposed")
            metric.pop("fingerprint", None)
            if "reads" not in metric and "reads" in draft:  # written before the log contract existed
                metric["reads"] = draft["reads"]
            metric.pop("serves", None)  # the roles follow the catalog, not the review
            if "serves" in draft:
                metric["serves"] = draft["serves"]
            merged[metric_id] = metric
            kept.add(metric_id)
    for metric_id, before in old.items():
        if metric_id in merged:
            continue
        metric = copy.deepcopy(before)
        if metric_id in folded and before.get("fingerprint") == fingerprint(before):
            continue  # generated, never edited, and now one role of another check
        if metric_id in folded and metric.get("status") != "stale":
            metric["previous_status"] = metric.get("status", "proposed")
            metric["status"] = "stale"
            metric["review"] = (f"the same signal is now checked once, by '{folded[metric_id]}' (see its serves); "
                                "carry your edits over to it and delete this metric")
        elif metric.get("source", "manual") != "manual" and metric.get("status") != "stale":
            metric["previous_status"] = metric.get("status", "proposed")
            metric["status"] = "stale"
            metric["review"] = f"rule '{metric.get('source')}' no longer applies; delete this metric or make it manual"
        merged[metric_id] = metric
        kept.add(metric_id)
    # Budget over everything that will alert, then size.
    budget = sizing.make_budget(list(merged.values()), pipeline.false_alarms_per_week,
                                pipeline.false_tickets_per_week, owners=[*graph.order, PIPELINE_OWNER])
    to_size: list[str] = []
    jobs: list[tuple[dict[str, Any], sizing.Traffic, sizing.Budget]] = []
    for metric_id, metric in merged.items():
        owner = metric_id.split(".", 1)[0]
        known: sizing.Traffic | None = traffic_of.get(metric_id)
        if known is None and (owner in stages or owner == PIPELINE_OWNER):
            edge = metric.get("edge")
            edge_t = (edge["from"], edge["to"]) if edge and edge.get("from") in stages else None
            known = context.traffic(owner, edge_t, _is_quality(metric))
        if known is not None and metric.get("status") != "stale" and metric.get("window"):
            to_size.append(metric_id)
            jobs.append((_sizing_input(metric, known), known, budget))
    for metric_id, result in zip(to_size, fan_out(_sized, jobs, key=_shares_tails)):  # independent checks, on every core
        metric = merged[metric_id]
        _store_sizing(metric, result, refresh=metric_id not in kept)
        if metric_id in kept:
            continue
        found = data_thresholds or _thresholds_kept_in(old.get(metric_id))
        if found:
            _apply_data_thresholds(metric, found, pipeline.thresholds_from_data == "replace")
    for metric_id, metric in merged.items():
        if metric_id not in kept:
            metric["fingerprint"] = fingerprint(metric)
    return _assemble(pipeline, graph, merged, kept, existing)


def _apply_data_thresholds(metric: dict[str, Any], found: dict[str, Any], replace: bool = False) -> None:
    """Raise warn and critical to what the reference data needs to hold the check's alpha; never lower them unless
    the description says ``thresholds_from_data: replace``."""
    fitted = found.get("checks", {}).get(metric["id"])
    if not fitted or fitted.get("signature") != contract.signature(metric):
        return
    raised = []
    for level in ("warn", "critical"):
        current, needed = metric.get(level), fitted.get(level)
        if current is None or needed is None:
            continue
        value = sizing.round_up(float(needed), 2)
        floor = (metric.get("sizing") or {}).get("noise_floor" if level == "critical" else "warn_noise_floor")
        if replace and floor is not None and value < floor:
            # A reference with no spread (no missing value in four weeks) asks for a threshold of nothing, which
            # would fire on one event: the noise floor under independent items stays the lower bound.
            value = sizing.round_up(float(floor), 2)
        if value > current or (replace and value < current):
            metric[level] = value
            raised.append(f"{level} {current:g} -> {value:g}")
    if metric.get("warn") is not None and metric.get("critical") is not None and metric["warn"] >= metric["critical"]:
        # The ticket budget needs a warn level as high as the critical one: a warn would only ever fire with it.
        metric["warn"] = None
        raised.append("warn dropped (it would need to sit at or above critical)")
    period = found.get("period", {})
    note = {"period": f"{period.get('from')} to {period.get('to')}", "day_blocks": fitted["blocks"],
            "windows": fitted["windows"], "dispersion": fitted["dispersion"],
            "dispersion_upper": fitted["dispersion_upper"],
            "critical": sizing._sig(fitted.get("critical"), 6), "warn": sizing._sig(fitted.get("warn"), 6)}
    block = metric.setdefault("sizing", {})
    block["from_data"] = note
    block["derivation"] = (block.get("derivation", "") + " From data: replaying the reference "
                           f"({note['period']}, {note['windows']} windows, {note['day_blocks']} whole days resampled) "
                           f"the statistic spreads {fitted['dispersion']:.3g}x as much as with independent items (upper "
                           f"90%: {fitted['dispersion_upper']:.3g}); holding this check's alpha over those windows needs "
                           f"critical >= {sizing._sig(note['critical'], 3)}"
                           + (f" and warn >= {sizing._sig(note['warn'], 3)}" if note["warn"] else "")
                           + (("; set " if replace else "; raised ") + ", ".join(raised) if raised
                              else "; the thresholds already hold it")
                           + ".").strip()


def _thresholds_kept_in(before: dict[str, Any] | None) -> dict[str, Any] | None:
    """The thresholds from data a metric carried in the plan being merged, in the form a baseline gives them, so
    that a re-propose without ``--baseline`` keeps them (until a new baseline replaces them)."""
    note = ((before or {}).get("sizing") or {}).get("from_data")
    if not note or before is None:
        return None
    start, _, end = str(note.get("period", "")).partition(" to ")
    fitted = {"signature": contract.signature(before), "critical": note.get("critical"), "warn": note.get("warn"),
              "blocks": note.get("day_blocks"), "windows": note.get("windows"),
              "dispersion": note.get("dispersion"), "dispersion_upper": note.get("dispersion_upper")}
    return {"checks": {before["id"]: fitted}, "period": {"from": start, "to": end}}


def _existing_metrics(plan: dict[str, Any]) -> dict[str, dict[str, Any]]:
    out: dict[str, dict[str, Any]] = {}
    for stage in plan.get("stages", []):
        for m in stage.get("metrics", []):
            out[m["id"]] = m
    for m in plan.get("pipeline_metrics", []) + plan.get("retired_metrics", []):
        out[m["id"]] = m
    return out


_LAYER_ORDER = {"software": 0, "input": 1, "output": 2}


def _sort_key(metric: dict[str, Any], position: dict[str, int]) -> tuple:
    return (_LAYER_ORDER.get(str(metric.get("layer")), 3), position.get(metric["id"], 10**9), metric["id"])


def _assemble(pipeline: Pipeline, graph: PipelineGraph, metrics: dict[str, dict[str, Any]], kept: set[str],
              existing: dict[str, Any] | None) -> dict[str, Any]:
    position = {metric_id: i for i, metric_id in enumerate(metrics)}
    by_owner: dict[str, list[dict[str, Any]]] = {}
    for metric_id, metric in metrics.items():
        by_owner.setdefault(metric_id.split(".", 1)[0], []).append(metric)
    head = pipeline.to_dict()
    plan: dict[str, Any] = {"plan_version": PLAN_VERSION}
    plan.update({k: v for k, v in head.items() if k != "stages"})
    stage_dicts = {s["id"]: s for s in head["stages"]}
    plan["stages"] = []
    for stage_id in graph.order:
        block = dict(stage_dicts[stage_id])
        block["downstream_reach"] = graph.reach[stage_id]
        block["metrics"] = [_order(m) for m in sorted(by_owner.get(stage_id, []),
                                                      key=lambda m: _sort_key(m, position))]
        plan["stages"].append(block)
    plan["pipeline_metrics"] = [_order(m) for m in sorted(by_owner.get(PIPELINE_OWNER, []),
                                                          key=lambda m: _sort_key(m, position))]
    retired = [m for owner, ms in by_owner.items() if owner not in stage_dicts and owner != PIPELINE_OWNER
               for m in ms]
    if retired:
        plan["retired_metrics"] = [_order(m) for m in sorted(retired, key=lambda m: m["id"])]
    plan["budget"] = budget_summary(plan)
    return plan


def all_metrics(plan: dict[str, Any]) -> list[dict[str, Any]]:
    out = [m for s in plan.get("stages", []) for m in s.get("metrics", [])]
    return out + list(plan.get("pipeline_metrics", []))


def budget_summary(plan: dict[str, Any]) -> dict[str, Any]:
    live = [m for m in all_metrics(plan) if m.get("status") not in ("rejected", "stale")]
    pages = [m for m in live if m.get("severity") == "page" and sizing.is_statistical(m)]
    number = sizing.number
    expected_pages = sum(number((m.get("sizing") or {}).get("expected_false_alarms_per_week")) for m in pages)
    expected_tickets = sum(number((m.get("sizing") or {}).get("expected_false_warnings_per_week"))
                           + (number((m.get("sizing") or {}).get("expected_false_alarms_per_week"))
                              if m.get("severity") == "ticket" else 0) for m in live)
    return {
        "false_alarms_per_week": plan["false_alarms_per_week"],
        "page_checks": len(pages),
        "expected_false_pages_per_week": sizing._sig(expected_pages, 3),
        "noise_model": "from sampling noise alone, under independent items, with each check evaluated once per "
                       "window as the Prometheus export configures; real data with hourly or weekly swings, or "
                       "items that come in bursts, alarm more often: compare with a replay of your own data",
        "false_tickets_per_week": plan["false_tickets_per_week"],
        "expected_false_tickets_per_week": sizing._sig(expected_tickets, 3),
        "split": "the budget split evenly over the stages and the whole pipeline, then evenly over each one's checks "
                 "(Bonferroni on the count), each share rounded down to 1, 2 or 5 times a power of ten",
        "not_counted": "fixed-limit levels and SLO burn-rate alerts, which have no sampling noise to budget",
    }


def dump(plan: dict[str, Any]) -> str:
    return HEADER + yamlio.dump(plan)


def require_plan(doc: yamlio.Document, path: str, reader: str = "this command reads") -> None:
    """Refuse a file that is not a plan, saying what it is when it is a pipeline description."""
    if isinstance(doc.data, dict) and "plan_version" not in doc.data and "stages" in doc.data:
        raise StagewatchError(f"this is a pipeline description, not a plan: {reader} the plan that "
                              f"`stagewatch propose {path} -o PLAN.yaml` writes", file=path, line=1,
                              expected="a plan (a file with plan_version, written by `stagewatch propose`)")
    if not isinstance(doc.data, dict) or "plan_version" not in doc.data:
        raise StagewatchError("this is not a stagewatch plan (no plan_version)", file=path, line=1,
                              expected="a file written by `stagewatch propose`")


def load_plan(path: str) -> tuple[dict[str, Any], yamlio.Document]:
    doc = yamlio.load(path)
    require_plan(doc, path)
    yamlio.validate(doc, "plan")
    pipeline_of(doc.data, doc)  # the description part, with its own schema and graph checks
    _check_metric_ids(doc)
    _check_thresholds(doc)
    return doc.data, doc


def check_values(data: Any, doc: yamlio.Document) -> None:
    """The rules on values the schema cannot express (thresholds of drift statistics are never negative)."""
    _check_thresholds(doc)


def _check_thresholds(doc: yamlio.Document) -> None:
    """Thresholds of drift statistics are sizes of change (see DEVELOPERS.md), so never negative; only fixed
    limits (``level``) read as levels. The schema bounds the numbers; this is the rule it cannot express."""
    for metric_id, where in _metric_places(doc.data):
        metric = _at(doc.data, where[:-1])
        if metric.get("statistic") == "level":
            continue
        for key in ("warn", "critical"):
            value = metric.get(key)
            if value is not None and value < 0:
                raise StagewatchError(f"metric '{metric_id}': {key} {value:g} is negative, but a "
                                      f"{metric.get('statistic')} threshold is a size of change",
                                      file=doc.path, line=doc.line_of((*where[:-1], key)),
                                      expected="a threshold of 0 or more (the direction key says which way)")


def _at(data: Any, keys: tuple[Any, ...]) -> Any:
    for key in keys:
        data = data[key]
    return data


def _metric_places(plan: dict[str, Any]) -> list[tuple[str, tuple[Any, ...]]]:
    out: list[tuple[str, tuple[Any, ...]]] = [(m["id"], ("stages", i, "metrics", j, "id"))
                                              for i, s in enumerate(plan["stages"])
                                              for j, m in enumerate(s.get("metrics", []))]
    for key in ("pipeline_metrics", "retired_metrics"):
        out += [(m["id"], (key, j, "id")) for j, m in enumerate(plan.get(key, []))]
    return out


def _check_metric_ids(doc: yamlio.Document) -> None:
    """Refuse a plan where two metrics share an id, or ids that become one alert name: a merge would keep only
    one of them, and a person's edits may be in the other."""
    places = _metric_places(doc.data)
    first_line: dict[str, int | None] = {}
    for metric_id, where in places:
        line = doc.line_of(where)
        if metric_id in first_line:
            raise StagewatchError(f"metric id '{metric_id}' appears twice (lines {first_line[metric_id]} and {line})",
                                  file=doc.path, line=line, expected="each metric id once; merge the two by hand")
        first_line[metric_id] = line
    clash = first_collision(places)
    if clash:
        (first, w1), (second, w2), output, form = clash
        raise StagewatchError(f"metric ids '{first}' (line {doc.line_of(w1)}) and '{second}' (line "
                              f"{doc.line_of(w2)}) both become '{form}' in {output}", file=doc.path,
                              line=doc.line_of(w2), expected="metric ids that differ in more than _ and -")


PLAN_ONLY_KEYS = ("plan_version", "pipeline_metrics", "retired_metrics", "budget")
PLAN_ONLY_STAGE_KEYS = ("metrics", "downstream_reach")


def pipeline_of(plan: dict[str, Any], doc: yamlio.Document | None = None) -> Pipeline:
    """The pipeline description inside a plan, checked against the pipeline schema with the plan's lines."""
    from stagewatch import spec

    description = {k: v for k, v in plan.items() if k not in PLAN_ONLY_KEYS}
    description["stages"] = [{k: v for k, v in s.items() if k not in PLAN_ONLY_STAGE_KEYS}
                             for s in plan["stages"]]
    pseudo = yamlio.Document(doc.path if doc else "<plan>", description, doc.root if doc else None)
    pipeline = spec.from_document(pseudo)
    PipelineGraph.build(pipeline, pseudo)
    return pipeline


