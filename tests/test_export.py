"""Exports checked by the real tools: promtool, amtool, Alertmanager and Prometheus servers on loopback."""

from __future__ import annotations

import json
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import numpy as np
import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import all_pipelines
from conftest import run_tool as _run
from conftest import tool as _tool
from stagewatch import durations
from stagewatch.exporters.checks import checks_document
from stagewatch.exporters.prometheus import alert_name, build, export_prometheus
from stagewatch.plan import all_metrics, compose, dump
from stagewatch.stats import STATISTICS
from stagewatch.resources import validator
from stagewatch.spec import load_pipeline

pytestmark = pytest.mark.slow  # promtool, amtool and live servers


@pytest.fixture(scope="module", params=all_pipelines(), ids=lambda p: p.stem)
def exported(request, tmp_path_factory):
    plan = compose(load_pipeline(str(request.param)))
    out = tmp_path_factory.mktemp(request.param.stem)
    export_prometheus(plan, str(out))
    return plan, out


def test_promtool_accepts_the_rules(exported):
    _, out = exported
    result = _run(_tool("promtool"), "check", "rules", *map(str, sorted((out / "rules").glob("*.yml"))))
    assert result.returncode == 0, result.stdout + result.stderr


def test_every_alert_fires_on_its_fault_and_stays_quiet_otherwise(exported):
    plan, out = exported
    tests = sorted((out / "tests").glob("*.yml"))
    result = _run(_tool("promtool"), "test", "rules", *map(str, tests))
    assert result.returncode == 0, result.stdout[-4000:] + result.stderr[-2000:]
    # Every alerting rule has a quiet and a firing evaluation in the tests.
    alerts = {r["alert"] for f in (out / "rules").glob("*.yml") for g in yaml.safe_load(f.read_text())["groups"]
              for r in g["rules"] if "alert" in r}
    quiet, firing = set(), set()
    for f in tests:
        for test in yaml.safe_load(f.read_text())["tests"]:
            for case in test["alert_rule_test"]:
                (firing if case["exp_alerts"] else quiet).add(case["alertname"])
    assert alerts and alerts == firing == quiet


def test_amtool_accepts_the_alertmanager_config(exported):
    _, out = exported
    result = _run(_tool("amtool"), "check-config", str(out / "alertmanager.yml"))
    assert result.returncode == 0, result.stdout + result.stderr


def test_the_rule_tests_can_fail(tmp_path):
    # Mutation check: raise one critical threshold far out of reach and the exported tests must fail.
    plan = compose(load_pipeline(str(all_pipelines()[0])))
    export_prometheus(plan, str(tmp_path))
    target = tmp_path / "rules" / "frame_gate.rules.yml"
    text = target.read_text()
    name = alert_name("frame_gate.output.pass_rate")
    rules = yaml.safe_load(text)
    for rule in (r for g in rules["groups"] for r in g["rules"]):
        if rule.get("alert") == name and rule["labels"]["level"] == "critical":
            rule["expr"] = rule["expr"].rsplit(">", 1)[0] + "> 0.99"
    target.write_text(yaml.safe_dump(rules, sort_keys=False))
    tests = sorted((tmp_path / "tests").glob("frame_gate.*.yml"))
    result = _run(_tool("promtool"), "test", "rules", *map(str, tests))
    assert result.returncode != 0 and name in result.stdout + result.stderr


def test_checks_export_meets_its_schema():
    for source in all_pipelines():
        plan = compose(load_pipeline(str(source)))
        document = checks_document(plan)
        validator("checks").validate(document)
        assert {c["id"] for c in document["checks"]} == {m["id"] for s in plan["stages"] for m in s["metrics"]} | {
            m["id"] for m in plan["pipeline_metrics"]}


def test_rejected_metrics_are_not_exported():
    plan = compose(load_pipeline(str(all_pipelines()[0])))
    plan["stages"][1]["metrics"][0]["status"] = "rejected"
    rejected = plan["stages"][1]["metrics"][0]["id"]
    exported = build(plan)
    assert all(r.get("labels", {}).get("check") != rejected for g in exported.groups for r in g.all_rules())
    assert rejected not in exported.instrumentation["checks"]


# --- inhibition in a real Alertmanager -----------------------------------------------------------------------

def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _get(url: str):
    with urllib.request.urlopen(url, timeout=5) as response:
        return json.loads(response.read())


def _wait(url: str, deadline: float) -> None:
    while time.monotonic() < deadline:
        try:
            urllib.request.urlopen(url, timeout=1).read()
            return
        except OSError:
            time.sleep(0.2)
    raise AssertionError(f"{url} did not come up")


def _start(args: list[str], log: Path) -> subprocess.Popen:
    return subprocess.Popen(args, stdout=log.open("w"), stderr=subprocess.STDOUT)


def _exported(out: Path, plan: dict, check: str, level: str = "critical") -> dict:
    """The alert Prometheus would send for ``check`` at ``level``: the exported rule's labels plus the series'."""
    stage = check.split(".", 1)[0]
    for path in (out / "rules").glob("*.yml"):
        for group in yaml.safe_load(path.read_text())["groups"]:
            for rule in group["rules"]:
                if rule.get("alert") == alert_name(check) and rule["labels"]["level"] == level:
                    labels = {**rule["labels"], "alertname": rule["alert"], "pipeline": plan["pipeline"],
                              "stage": stage, "check": check}
                    return {"labels": labels, "annotations": {"summary": check}}
    raise AssertionError(f"no {level} alert for {check}")


def _alertmanager_states(tmp_path: Path, config: Path, alerts: list[dict], settled) -> dict:
    """Post ``alerts`` to a real Alertmanager on loopback and return each check's status once ``settled``."""
    tmp_path.mkdir(parents=True, exist_ok=True)
    port, cluster = _free_port(), _free_port()
    proc = _start([_tool("prometheus-alertmanager") if shutil.which("prometheus-alertmanager") else
                   _tool("alertmanager"), f"--config.file={config}", f"--storage.path={tmp_path / 'am-data'}",
                   f"--web.listen-address=127.0.0.1:{port}", f"--cluster.listen-address=127.0.0.1:{cluster}",
                   "--cluster.peer-timeout=1s"], tmp_path / "alertmanager.log")
    base = f"http://127.0.0.1:{port}"
    try:
        _wait(f"{base}/-/ready", time.monotonic() + 30)
        request = urllib.request.Request(f"{base}/api/v2/alerts", data=json.dumps(alerts).encode(),
                                         headers={"Content-Type": "application/json"}, method="POST")
        urllib.request.urlopen(request, timeout=5).read()
        deadline = time.monotonic() + 30
        state: dict = {}
        while time.monotonic() < deadline:
            state = {a["labels"]["check"]: a["status"] for a in _get(f"{base}/api/v2/alerts")}
            if len(state) == len(alerts) and settled(state):
                break
            time.sleep(0.3)
        return state
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def test_an_upstream_change_inhibits_downstream_drift_alerts_in_alertmanager(tmp_path):
    plan = compose(load_pipeline(str(all_pipelines()[0])))
    out = tmp_path / "export"
    export_prometheus(plan, str(out))
    checks = ["frame_gate.output.pass_rate",  # the cause: the gate passes fewer frames
              "variety_tagger.input.brightness", "grade_assigner.input.blemish_score_drift",  # drift below
              "grade_assigner.software.saturation",  # not drift: a saturated grade_assigner still pages
              "line_camera.input.brightness"]  # drift above the cause: never held back by it
    state = _alertmanager_states(tmp_path, out / "alertmanager.yml", [_exported(out, plan, c) for c in checks],
                                 lambda s: s["variety_tagger.input.brightness"]["inhibitedBy"])
    assert state["frame_gate.output.pass_rate"]["state"] == "active"
    assert state["line_camera.input.brightness"]["state"] == "active"
    assert state["variety_tagger.input.brightness"]["state"] == "suppressed"  # still listed, marked inhibited
    assert state["grade_assigner.input.blemish_score_drift"]["inhibitedBy"]
    assert state["grade_assigner.software.saturation"]["state"] == "active"


def test_inhibition_never_hides_a_contract_or_quality_page_and_a_models_age_hides_nothing(tmp_path):
    plan = compose(load_pipeline(str(all_pipelines()[0])))
    out = tmp_path / "export"
    export_prometheus(plan, str(out))
    upstream_drift = "variety_tagger.output.attribute_mix"
    below = ["grade_assigner.input.variety_mix",  # drift below: held back
             "grade_assigner.input.from_variety_tagger_contract",  # a contract break: harm, never held back
             "grade_assigner.output.quality"]  # label-based quality: harm itself, never held back
    alerts = [_exported(out, plan, c) for c in [upstream_drift, *below]]
    state = _alertmanager_states(tmp_path, out / "alertmanager.yml", alerts,
                                 lambda s: s[below[0]]["inhibitedBy"])
    assert state[below[0]]["state"] == "suppressed"
    assert state[below[1]]["state"] == "active" and not state[below[1]]["inhibitedBy"]
    assert state[below[2]]["state"] == "active" and not state[below[2]]["inhibitedBy"]
    # the model-age ticket on variety_tagger (a software alert) explains nothing: it holds back no page below
    age = "variety_tagger.software.model_age"
    rules = [r for p in (out / "rules").glob("*.yml") for g in yaml.safe_load(p.read_text())["groups"]
             for r in g["rules"] if r.get("alert") == alert_name(age)]
    level = rules[0]["labels"]["level"]
    alerts = [_exported(out, plan, age, level), *(_exported(out, plan, c) for c in below)]
    state = _alertmanager_states(tmp_path / "second", out / "alertmanager.yml", alerts,
                                 lambda s: any(v["inhibitedBy"] for v in s.values()))  # waits the full 30 s
    assert all(state[c]["state"] == "active" and not state[c]["inhibitedBy"] for c in below), state
    # the upstream alert names what it may explain
    mix = next(r for p in (out / "rules").glob("*.yml") for g in yaml.safe_load(p.read_text())["groups"]
               for r in g["rules"] if r.get("alert") == alert_name(upstream_drift) and r["labels"]["level"] == "critical")
    assert "grade_assigner.input.variety_mix" in mix["annotations"]["likely_explains"]


# --- a real Prometheus server scraping the example exporter -------------------------------------------------

def test_live_prometheus_evaluates_every_rule_and_fires_the_fault(tmp_path):
    plan = compose(load_pipeline(str(all_pipelines()[0])))
    out = tmp_path / "export"
    export_prometheus(plan, str(out))
    fault = "frame_gate.output.pass_rate"
    # Statistical checks are evaluated once per window (group interval = window). A test cannot wait an hour, so
    # the server here evaluates every group each second; that the intervals are written is checked apart.
    for path in (out / "rules").glob("*.yml"):
        rules = yaml.safe_load(path.read_text())
        for group in rules["groups"]:
            group.pop("interval", None)
        path.write_text(yaml.safe_dump(rules, sort_keys=False))
    exporter_port, prom_port = _free_port(), _free_port()
    config = {"global": {"scrape_interval": "1s", "evaluation_interval": "1s"},
              "rule_files": [str(p) for p in sorted((out / "rules").glob("*.yml"))],
              "scrape_configs": [{"job_name": "stage", "static_configs": [
                  {"targets": [f"127.0.0.1:{exporter_port}"]}]}]}
    (tmp_path / "prometheus.yml").write_text(yaml.safe_dump(config))
    exporter = _start([sys.executable, str(out / "example_exporter.py"), "--port", str(exporter_port),
                       "--fault", fault, "--seconds", "120"], tmp_path / "exporter.log")
    prometheus = _start([_tool("prometheus"), f"--config.file={tmp_path / 'prometheus.yml'}",
                         f"--storage.tsdb.path={tmp_path / 'tsdb'}", f"--web.listen-address=127.0.0.1:{prom_port}"],
                        tmp_path / "prometheus.log")
    base = f"http://127.0.0.1:{prom_port}"
    try:
        _wait(f"http://127.0.0.1:{exporter_port}/metrics", time.monotonic() + 30)
        _wait(f"{base}/-/ready", time.monotonic() + 60)
        name = alert_name(fault)
        deadline = time.monotonic() + 60
        firing, rules = [], []
        while time.monotonic() < deadline:
            rules = [r for g in _get(f"{base}/api/v1/rules")["data"]["groups"] for r in g["rules"]]
            alerts = _get(f"{base}/api/v1/alerts")["data"]["alerts"]
            firing = [a for a in alerts if a["labels"]["alertname"] == name and a["state"] == "firing"]
            if firing and all(r.get("health") == "ok" for r in rules):
                break
            time.sleep(1)
        bad = [(r["name"], r.get("health"), r.get("lastError")) for r in rules if r.get("health") != "ok"]
        assert rules and not bad, bad[:5]
        assert {a["labels"]["level"] for a in firing} == {"warn", "critical"}, (tmp_path / "prometheus.log").read_text()[-2000:]
        # A check without a fault stays quiet.
        quiet = alert_name("variety_tagger.output.unknown_share")
        assert not [a for a in _get(f"{base}/api/v1/alerts")["data"]["alerts"] if a["labels"]["alertname"] == quiet
                    and a["state"] == "firing"]
    finally:
        for proc in (prometheus, exporter):
            proc.terminate()
            proc.wait(timeout=15)


# --- property: any valid pipeline exports rules promtool accepts ---------------------------------------------

_ids = st.from_regex(r"[a-z][a-z0-9_]{0,10}", fullmatch=True)


@st.composite
def pipelines(draw):
    n = draw(st.integers(1, 6))
    ids = draw(st.lists(_ids.filter(lambda s: s != "pipeline"), min_size=n, max_size=n,
                        unique_by=lambda s: s.replace("_", "")))  # ids that differ only in _ are refused
    stages = []
    for i, sid in enumerate(ids):
        kind = draw(st.sampled_from(["learned", "rule-based", "source"]))
        serving = draw(st.sampled_from(["online", "batch", "device"]))
        stage = {"id": sid, "kind": kind,
                 "modality": draw(st.sampled_from(["audio", "image", "video", "text", "tabular", "events",
                                                   "timeseries"])),
                 "output": draw(st.sampled_from(["gate", "segments", "class", "attribute", "score", "value",
                                                 "ranking", "text", "records"])),
                 "serving": serving, "volume_per_hour": draw(st.sampled_from([1, 30, 1000, 200000])),
                 "change_rate": draw(st.sampled_from(["minutes", "hours", "days", "months"])),
                 "upstream": sorted(draw(st.sets(st.sampled_from(ids[:i]), max_size=2)))
                 if i and kind != "source" else []}  # a source takes no upstream
        if serving == "online" and draw(st.booleans()):
            stage["latency_slo_ms"] = draw(st.sampled_from([5, 40, 250, 1500]))
        if kind == "learned" and draw(st.booleans()):
            stage.update(labels="delayed", label_delay=draw(st.sampled_from(["1h", "2d"])))
        if draw(st.booleans()):
            stage["inputs"] = [{"name": "f_num", "type": "numeric", "range": [0, 1]},
                               {"name": "f_cat", "type": "category"}]
        stages.append(stage)
    return {"pipeline": "random", "context": draw(st.sampled_from(["consumer", "business"])), "stages": stages}


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(description=pipelines())
def test_any_valid_pipeline_exports_rules_promtool_accepts(tmp_path_factory, description):
    work = tmp_path_factory.mktemp("random")
    source = work / "pipeline.yaml"
    source.write_text(yaml.safe_dump(description, sort_keys=False))
    plan = compose(load_pipeline(str(source)))
    (work / "plan.yaml").write_text(dump(plan))
    export_prometheus(plan, str(work / "out"))
    rules = sorted((work / "out" / "rules").glob("*.yml"))
    result = _run(_tool("promtool"), "check", "rules", *map(str, rules))
    assert result.returncode == 0, result.stdout + result.stderr
    am = _run(_tool("amtool"), "check-config", str(work / "out" / "alertmanager.yml"))
    assert am.returncode == 0, am.stdout + am.stderr


def test_hostile_free_text_stays_inert_in_rules_and_routing(tmp_path, write):
    from conftest import SMALL

    source = write("p.yaml", SMALL.replace("context: business", 'context: business\nowner: \'ops "night" team\''))
    plan = compose(load_pipeline(str(source)))
    plan["stages"][1]["metrics"].append({
        "id": "scorer.output.refunds", "layer": "output", "status": "accepted", "source": "manual",
        "measure": "refund share {{ range $x := . }}", "statistic": "proportion", "params": {"baseline": 0.02},
        "window": "1h", "reference": "28d", "warn": None, "critical": 0.05, "direction": "above",
        "severity": "page", "catches": ["concept-drift"], "why": "{{ template \"x\" }} <script>alert(1)</script>"})
    export_prometheus(plan, str(tmp_path / "out"))
    rules = sorted((tmp_path / "out" / "rules").glob("*.yml"))
    result = _run(_tool("promtool"), "check", "rules", *map(str, rules))
    assert result.returncode == 0, result.stdout + result.stderr
    assert "{{ range" not in (tmp_path / "out" / "rules" / "scorer.rules.yml").read_text()
    tests = sorted((tmp_path / "out" / "tests").glob("scorer.*.yml"))
    assert _run(_tool("promtool"), "test", "rules", *map(str, tests)).returncode == 0
    am = _run(_tool("amtool"), "check-config", str(tmp_path / "out" / "alertmanager.yml"))
    assert am.returncode == 0, am.stdout + am.stderr


def test_instrumentation_asks_for_every_series_at_zero_and_the_example_creates_them(tmp_path):
    import importlib.util

    from prometheus_client import CollectorRegistry, generate_latest

    plan = compose(load_pipeline(str(all_pipelines()[0])))
    out = tmp_path / "export"
    export_prometheus(plan, str(out))
    text = (out / "instrumentation.md").read_text()
    assert "Create every series at 0" in text and "(count + 0.5) / (total + 0.5 x bins)" in text
    spec = importlib.util.spec_from_file_location("example_exporter", out / "example_exporter.py")
    example = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(example)
    instrumentation = json.loads((out / "instrumentation.json").read_text())
    registry = CollectorRegistry()
    example.build(instrumentation, registry)  # before any tick: nothing counted yet
    exposition = generate_latest(registry).decode()
    bin_uses = [u for f in instrumentation["families"] if f["name"] == "stagewatch_check_bin_items_total"
                for u in f["uses"]]
    assert bin_uses
    for use in bin_uses:
        for b in range(int(use["bins"])):
            assert (f'stagewatch_check_bin_items_total{{bin="{b}",check="{use["check"]}",pipeline="{plan["pipeline"]}",'
                    f'stage="{use["stage"]}"}} 0.0') in exposition, (use["check"], b)


def test_statistical_checks_are_evaluated_once_per_window(exported):
    # The budget assumes one evaluation per window on tumbling windows: each sized check sits in a group whose
    # interval is its window; fixed limits and SLO pairs stay in the stage's group at the global interval.
    plan, out = exported
    windows = {m["id"]: m["window"] for m in all_metrics(plan)}
    statistical = {m["id"] for m in all_metrics(plan) if m["statistic"] in STATISTICS}
    seen = set()
    for path in (out / "rules").glob("*.yml"):
        for group in yaml.safe_load(path.read_text())["groups"]:
            for rule in group["rules"]:
                check = rule.get("labels", {}).get("check") or rule.get("annotations", {}).get("plan_metric")
                if check in statistical:
                    assert group.get("interval") == windows[check], (group["name"], check)
                    seen.add(check)
                elif check in windows:
                    assert "interval" not in group, (group["name"], check)
    assert seen == statistical & {m["id"] for m in all_metrics(plan) if m["status"] != "rejected"}


def test_a_label_based_check_fires_one_label_delay_after_predictions_change(tmp_path):
    """Quality counters count labelled items when the label arrives (the instrumentation says so): predictions that
    go wrong at T reach the counters at T + label delay, and the alert fires after that, not before (promtool)."""
    plan = compose(load_pipeline(str(all_pipelines()[0])))
    export_prometheus(plan, str(tmp_path))
    metric = next(m for s in plan["stages"] for m in s["metrics"] if m["id"] == "variety_tagger.output.quality")
    assert metric["on_labels"]
    instrumentation = (tmp_path / "instrumentation.md").read_text()
    assert "increment when the label arrives" in instrumentation
    rules = [r for g in yaml.safe_load((tmp_path / "rules" / "variety_tagger.rules.yml").read_text())["groups"]
             for r in g["rules"]]
    alerts = [r for r in rules if r.get("alert") == alert_name(metric["id"])]
    alert = next(r for r in alerts if r["labels"]["level"] == "critical")
    assert "label arrives" in alert["annotations"]["counting"]
    delay = durations.parse("2d")  # the demo's label delay for variety_tagger
    window = durations.parse(metric["window"])
    step = 600
    change = 6 * 3600  # predictions go wrong here
    arrive = change + delay  # ... and their labels arrive here
    steps = (arrive + 3 * window) // step
    labels = f'pipeline="{plan["pipeline"]}", stage="variety_tagger", check="{metric["id"]}"'
    p0 = 0.05
    wrong = [p0 if i * step < arrive else min(1.0, p0 + 2 * metric["critical"]) for i in range(steps)]
    items = [100.0 * i for i in range(steps)]
    matches = list(np.cumsum([0.0] + [100.0 * w for w in wrong[:-1]]))
    series = [{"series": f"stagewatch_check_items_total{{{labels}}}", "values": " ".join(f"{v:g}" for v in items)},
              {"series": f"stagewatch_check_matches_total{{{labels}}}", "values": " ".join(f"{v:g}" for v in matches)},
              {"series": f"stagewatch_reference_share{{{labels}}}", "values": " ".join([f"{p0:g}"] * steps)}]
    before, after = arrive - step, arrive + 2 * window
    test = {"rule_files": [str(tmp_path / "rules" / "variety_tagger.rules.yml")], "evaluation_interval": f"{step}s",
            "tests": [{"interval": f"{step}s", "input_series": series, "alert_rule_test": [
                {"eval_time": f"{before}s", "alertname": alert["alert"], "exp_alerts": []},
                {"eval_time": f"{change + window}s", "alertname": alert["alert"], "exp_alerts": []},
            ]}]}
    firing = _run(_tool("promtool"), "test", "rules", str(_write_test(tmp_path, test, after, alerts, labels)))
    quiet = _run(_tool("promtool"), "test", "rules", str(_write_yaml(tmp_path / "quiet.yml", test)))
    assert quiet.returncode == 0, quiet.stdout + quiet.stderr
    assert firing.returncode == 0, firing.stdout + firing.stderr


def _write_yaml(path: Path, doc: dict) -> Path:
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    return path


def _write_test(tmp_path: Path, test: dict, at: int, alerts: list[dict], labels: str) -> Path:
    """The same series, now expecting every level of the alert at ``at``, with its labels as exported."""
    import copy

    doc = copy.deepcopy(test)
    series = dict(kv.split("=", 1) for kv in labels.replace('"', "").split(", "))
    expected = [{"exp_labels": {**a["labels"], "alertname": a["alert"], **series}, "exp_annotations": a["annotations"]}
                for a in alerts]
    doc["tests"][0]["alert_rule_test"] = [{"eval_time": f"{at}s", "alertname": alerts[0]["alert"],
                                           "exp_alerts": expected}]
    return _write_yaml(tmp_path / "firing.yml", doc)


BATCH = """
pipeline: bike-share
context: business
stages:
  - id: dock_snapshot
    kind: source
    modality: tabular
    output: records
    serving: batch
    run_every: 1d
    volume_per_hour: 20
    inputs:
      - {name: docked_bikes, type: numeric, range: [0, 80]}
"""


@pytest.mark.parametrize("case,runs,fires", [
    ("on time, usual volume", [480, 480, 480, 480], False),
    ("a run missing", [480, 480, 480, 0], True),
    ("a half-size run", [480, 480, 480, 240], True),
])
def test_a_daily_batch_is_judged_per_run(tmp_path, write, case, runs, fires):
    """A daily batch lands its rows at 02:00; the record count is checked over whole days against the reference
    rate, evaluated once a day (here at 14:00, any fixed time of day): quiet for a usual run, firing for a missing
    or half-size one (promtool)."""
    plan = compose(load_pipeline(str(write("pipeline.yaml", BATCH))))
    metric = next(m for m in plan["stages"][0]["metrics"] if m["id"] == "dock_snapshot.output.record_count")
    assert metric["window"] == "1d" and plan["stages"][0]["change_rate"] == "days"
    export_prometheus(plan, str(tmp_path / "out"))
    rule_file = tmp_path / "out" / "rules" / "dock_snapshot.rules.yml"
    alerts = [r for g in yaml.safe_load(rule_file.read_text())["groups"] for r in g["rules"]
              if r.get("alert") == alert_name(metric["id"])]
    step = 600
    per_day = 86400 // step
    labels = f'pipeline="bike-share", stage="dock_snapshot", check="{metric["id"]}"'
    total, values = 0.0, []
    for day, rows in enumerate(runs):
        for i in range(per_day):
            if i == 2 * 3600 // step:  # the run lands at 02:00
                total += rows
            values.append(total)
    series = [{"series": f"stagewatch_check_items_total{{{labels}}}", "values": " ".join(f"{v:g}" for v in values)},
              {"series": f"stagewatch_reference_items_per_second{{{labels}}}",
               "values": " ".join([f"{480 / 86400:.10g}"] * len(values))}]
    at = 3 * 86400 + 14 * 3600  # the fourth day, 14:00
    expected = []
    if fires:
        series_labels = dict(kv.split("=", 1) for kv in labels.replace('"', "").split(", "))
        expected = [{"exp_labels": {**a["labels"], "alertname": a["alert"], **series_labels},
                     "exp_annotations": a["annotations"]} for a in alerts]
    test = {"rule_files": [str(rule_file)], "evaluation_interval": f"{step}s",
            "tests": [{"interval": f"{step}s", "input_series": series, "alert_rule_test": [
                {"eval_time": f"{2 * 86400 + 14 * 3600}s", "alertname": alerts[0]["alert"], "exp_alerts": []},
                {"eval_time": f"{at}s", "alertname": alerts[0]["alert"], "exp_alerts": expected}]}]}
    proc = _run(_tool("promtool"), "test", "rules", str(_write_yaml(tmp_path / "batch.yml", test)))
    assert proc.returncode == 0, case + "\n" + proc.stdout[-3000:] + proc.stderr[-2000:]
