"""The Bernoulli CUSUM's run lengths: the Markov-chain value against simulation, and the limit that gives a
chosen in-control run length."""

from __future__ import annotations

import numpy as np
import pytest

from stagewatch import cusum


def _simulate_run_lengths(p: float, p0: float, p1: float, h: float, runs: int, seed: int) -> np.ndarray:
    a, b = cusum.bernoulli_cusum_increments(p0, p1)
    rng = np.random.default_rng(seed)
    out = np.empty(runs)
    for r in range(runs):
        s, t = 0.0, 0
        while True:
            chunk = rng.random(4096) < p
            for x in chunk:
                t += 1
                s = max(0.0, s + (a if x else b))
                if s >= h:
                    break
            else:
                continue
            break
        out[r] = t
    return out


@pytest.mark.parametrize("p,label", [(0.1, "in control"), (0.2, "p doubled")])
def test_markov_chain_run_length_matches_simulation(p, label):
    # Brook & Evans (1972) Markov chain on the discretised CUSUM; Reynolds & Stoumbos (1999) for the increments.
    p0, p1, h = 0.1, 0.2, 2.5
    computed = cusum.bernoulli_cusum_arl(p, p0, p1, h, resolution=40)
    lengths = _simulate_run_lengths(p, p0, p1, h, runs=400, seed=7)
    standard_error = lengths.std(ddof=1) / np.sqrt(lengths.size)
    # within 3 standard errors of the simulated mean, plus 3% for the discretisation of S
    assert abs(computed - lengths.mean()) <= 3 * standard_error + 0.03 * computed, (label, computed, lengths.mean())


def test_the_limit_gives_the_chosen_in_control_run_length():
    h = cusum.bernoulli_cusum_limit(0.05, 0.1, 2000.0)
    assert cusum.bernoulli_cusum_arl(0.05, 0.05, 0.1, h) == pytest.approx(2000.0, rel=0.01)
    assert cusum.bernoulli_cusum_arl(0.1, 0.05, 0.1, h) < 2000.0 / 5  # a doubled share is caught far sooner


def test_grouped_cusum_never_exceeds_the_item_by_item_cusum():
    rng = np.random.default_rng(3)
    items = rng.random(5000) < 0.12
    p0, p1 = 0.1, 0.2
    a, b = cusum.bernoulli_cusum_increments(p0, p1)
    s, item_path = 0.0, []
    for x in items:
        s = max(0.0, s + (a if x else b))
        item_path.append(s)
    groups = items.reshape(100, 50)
    grouped, _ = cusum.binomial_cusum(groups.sum(axis=1), np.full(100, 50), p0, p1)
    assert np.all(grouped <= np.array(item_path)[49::50] + 1e-9)


def test_check_and_replay_run_the_cusum_a_reviewer_asks_for(tmp_path, capsys):
    """A reviewer adds `sequential: {method: cusum}` to a share; check reports the CUSUM beside the window rule and
    replay catches a doubled share with it."""
    import json

    import yaml

    from datagen import T0, data_args, write_declared_logs
    from stagewatch.cli import main
    from stagewatch.data.sources import format_time
    from test_data_check import COLD_STORE, REF_END

    (tmp_path / "pipeline.yaml").write_text(COLD_STORE)
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(tmp_path / "pipeline.yaml"), "-o", str(plan)]) == 0
    doc = yaml.safe_load(plan.read_text())
    target = "spoilage_model.output.unknown_share"
    for stage in doc["stages"]:
        for metric in stage["metrics"]:
            if metric["id"] == target:
                metric["sequential"] = {"method": "cusum", "shift": 2}
    plan.write_text(yaml.safe_dump(doc, sort_keys=False))
    paths = write_declared_logs(doc, tmp_path / "logs")
    assert main(["calibrate", str(plan), *data_args(paths), "--to", REF_END, "-o", str(tmp_path / "b")]) == 0
    capsys.readouterr()
    main(["check", str(plan), "--baseline", str(tmp_path / "b"), *data_args(paths), "--format", "json"])
    checks = {c["id"]: c for c in json.loads(capsys.readouterr().out)["checks"]}
    cusum = checks[target + "#cusum"]
    assert cusum["statistic"] == "cusum" and cusum["critical"] > 0 and cusum["verdict"] in ("ok", "critical")
    main(["replay", str(plan), "--baseline", str(tmp_path / "b"), *data_args(paths), "--format", "json",
          "--from", format_time(T0 + 12 * 86400), "--to", format_time(T0 + 14 * 86400),
          "--inject", f"spoilage_model.risk=swap:low/unknown@{format_time(T0 + 13 * 86400)}"])
    doc = json.loads(capsys.readouterr().out)
    delays = doc["injection"]["detection"]
    assert delays[target + "#cusum"] is not None and delays[target + "#cusum"] < 6 * 3600


def test_the_prometheus_export_alerts_on_the_cusum_check_publishes(tmp_path):
    """promtool accepts the rule and its generated test: quiet below S / h = 1, firing at it."""
    import shutil
    import subprocess

    import yaml

    from stagewatch.exporters.prometheus import alert_name, export_prometheus
    from stagewatch.plan import compose
    from stagewatch.spec import load_pipeline
    from test_data_check import COLD_STORE

    (tmp_path / "pipeline.yaml").write_text(COLD_STORE)
    plan = compose(load_pipeline(str(tmp_path / "pipeline.yaml")))
    target = "spoilage_model.output.unknown_share"
    for stage in plan["stages"]:
        for metric in stage["metrics"]:
            if metric["id"] == target:
                metric["sequential"] = {"method": "cusum"}
    export_prometheus(plan, str(tmp_path / "out"))
    rules = [r for f in (tmp_path / "out" / "rules").glob("*.yml") for g in yaml.safe_load(f.read_text())["groups"]
             for r in g["rules"]]
    cusum = [r for r in rules if r.get("alert") == alert_name(target + "#cusum")]
    assert cusum and 'check="spoilage_model.output.unknown_share#cusum"' in " ".join(r.get("expr", "") for r in rules)
    promtool = shutil.which("promtool")
    assert promtool, "promtool is installed by `make test` (.ci/install-tools)"
    files = sorted(str(p) for p in (tmp_path / "out" / "tests").glob("*.yml"))
    proc = subprocess.run([promtool, "test", "rules", *files], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
