"""Thresholds from data: the dispersion of a check measured by resampling whole days, checked against the
long-run variance of an AR(1) series, and the budget kept on a stream with a daily cycle where the
independent-item thresholds blow it."""

from __future__ import annotations

import json

import duckdb
import numpy as np
import pytest
import yaml

from datagen import T0
from stagewatch.cli import main
from test_data_check import COLD_STORE

LEVEL = "probe.input.level_shift"


def _ar1_log(path, phi: float, seed: int, shuffle: bool = False, days: int = 14, per_hour: int = 400) -> str:
    rng = np.random.default_rng(seed)
    n = days * 24 * per_hour
    e = rng.normal(0, 1, n)
    x = np.empty(n)
    x[0] = e[0]
    for i in range(1, n):
        x[i] = phi * x[i - 1] + e[i] * np.sqrt(1 - phi**2)  # unit marginal variance
    if shuffle:
        x = rng.permutation(x)  # what resampling items one by one sees: no autocorrelation left
    ts = T0 + (np.arange(n) + 0.5) * 3600.0 / per_hour
    con = duckdb.connect()
    frame = {"ts": ts, "temp_c": 5 + 2 * x, "room": np.array(["r1"] * n, dtype=object)}
    con.register("frame", frame)
    con.execute(f"COPY (SELECT to_timestamp(ts) AS timestamp, temp_c, room FROM frame) TO '{path}' (FORMAT parquet)")
    return str(path)


@pytest.fixture(scope="module")
def plan(tmp_path_factory):
    work = tmp_path_factory.mktemp("ar1")
    (work / "pipeline.yaml").write_text(COLD_STORE)
    assert main(["propose", str(work / "pipeline.yaml"), "-o", str(work / "plan.yaml")]) == 0
    return work / "plan.yaml"


def _dispersion(plan, tmp_path, log: str) -> dict:
    out = tmp_path / "base"
    assert main(["calibrate", str(plan), "--data", f"probe={log}", "-o", str(out), "--thresholds"]) == 0
    return json.loads((out / "baseline.json").read_text())["baseline"]["thresholds"]["checks"][LEVEL]


def test_day_blocks_recover_the_long_run_variance_of_ar1_items(plan, tmp_path):
    # Long-run variance of an AR(1) process relative to its marginal variance: (1 + phi) / (1 - phi)
    # (Hamilton, Time Series Analysis, 1994, eq. 7.2.8 with the AR(1) autocovariances): 3 at phi = 0.5.
    fitted = _dispersion(plan, tmp_path, _ar1_log(tmp_path / "ar1.parquet", 0.5, seed=1))
    assert fitted["dispersion"] == pytest.approx(3.0, rel=0.15)
    assert fitted["blocks"] == 14
    assert fitted["dispersion_upper"] >= fitted["dispersion"]


def test_items_resampled_one_by_one_would_miss_it(plan, tmp_path):
    fitted = _dispersion(plan, tmp_path, _ar1_log(tmp_path / "iid.parquet", 0.5, seed=1, shuffle=True))
    assert fitted["dispersion"] == pytest.approx(1.0, rel=0.15)


def test_the_threshold_grows_with_the_dispersion(plan, tmp_path):
    a = _dispersion(plan, tmp_path / "a", _ar1_log(tmp_path / "a.parquet", 0.5, seed=2))
    b = _dispersion(plan, tmp_path / "b", _ar1_log(tmp_path / "b.parquet", 0.5, seed=2, shuffle=True))
    # a normal tail scales with the standard deviation: sqrt(c) (the same alpha, the same windows)
    assert a["critical"] / b["critical"] == pytest.approx(np.sqrt(a["dispersion_upper"] / b["dispersion_upper"]),
                                                          rel=1e-3)


@pytest.mark.slow
def test_thresholds_from_data_keep_the_budget_out_of_sample_on_a_daily_cycle(tmp_path):
    """The demo's stream (packing shifts by day, quiet nights, no change before the gate is retuned): thresholds
    fitted on two weeks hold the ticket and page budgets on the next two, where the plan's independent-item
    thresholds raise hundreds of tickets a week."""
    from stagewatch.demo import DEMO
    from stagewatch.demo_logs import START, write_logs

    def iso(t: float) -> str:
        from stagewatch.data.sources import format_time
        return format_time(t)

    pipeline = tmp_path / "pipeline.yaml"
    pipeline.write_text(DEMO.read_text())
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(pipeline), "-o", str(plan)]) == 0
    paths = write_logs(yaml.safe_load(plan.read_text()), str(tmp_path / "logs"))
    data = [x for stage, p in paths.items() for x in ("--data", f"{stage}={p}")]
    fit_to, test_to = iso(START + 14 * 86400), iso(START + 28 * 86400)
    assert main(["calibrate", str(plan), *data, "--to", fit_to, "-o", str(tmp_path / "b1"), "--thresholds"]) == 0
    tuned = tmp_path / "tuned.yaml"
    tuned.write_text(plan.read_text())
    assert main(["propose", str(pipeline), "-o", str(tuned), "--baseline", str(tmp_path / "b1")]) == 0
    results = {}
    for name, p in (("conventional", plan), ("from data", tuned)):
        assert main(["calibrate", str(p), *data, "--to", fit_to, "-o", str(tmp_path / f"b-{name}")]) == 0
        out = tmp_path / f"{name}.json"
        main(["replay", str(p), "--baseline", str(tmp_path / f"b-{name}"), *data, "--from", fit_to, "--to", test_to,
              "--format", "json", "-o", str(out)])
        results[name] = json.loads(out.read_text())["pipeline"]
    # Budgets: 1 page and 5 tickets a week. Over two weeks, a Poisson count whose mean is the budget stays at or
    # below 6 pages and 18 tickets with probability 0.99 (scipy.stats.poisson.ppf(0.99, 2) = 6, ppf(0.99, 10) = 18).
    assert results["from data"]["pages_per_week"] * 2 <= 6
    assert results["from data"]["tickets_per_week"] * 2 <= 18
    assert results["conventional"]["tickets_per_week"] * 2 > 18


@pytest.mark.parametrize("mode", ["raise", "replace"])
def test_thresholds_from_data_never_lower_a_threshold_unless_the_description_asks(plan, tmp_path, mode):
    log = _ar1_log(tmp_path / "iid.parquet", 0.5, seed=3, shuffle=True)
    fitted = _dispersion(plan, tmp_path, log)
    description = tmp_path / "pipeline.yaml"
    text = COLD_STORE if mode == "raise" else COLD_STORE.replace("context: business",
                                                                 "context: business\nthresholds_from_data: replace")
    description.write_text(text)
    out = tmp_path / "tuned.yaml"
    assert main(["propose", str(description), "-o", str(out), "--baseline", str(tmp_path / "base")]) == 0
    tuned = next(m for s in yaml.safe_load(out.read_text())["stages"] for m in s["metrics"] if m["id"] == LEVEL)
    conventional = 0.5  # the catalog's critical for a level shift, in reference standard deviations
    assert fitted["critical"] < conventional  # 400 independent items an hour: the data needs much less
    if mode == "raise":
        assert tuned["critical"] == conventional
    else:
        from stagewatch.sizing import round_up

        assert tuned["critical"] == round_up(fitted["critical"], 2) < conventional  # rounded up, 2 figures
    assert tuned["sizing"]["from_data"]["day_blocks"] == 14


def test_a_re_propose_without_baseline_keeps_the_thresholds_from_data(plan, tmp_path, capsys):
    log = _ar1_log(tmp_path / "iid.parquet", 0.5, seed=3, shuffle=True)
    _dispersion(plan, tmp_path, log)
    description = tmp_path / "pipeline.yaml"
    description.write_text(COLD_STORE.replace("context: business", "context: business\nthresholds_from_data: replace"))
    out = tmp_path / "tuned.yaml"
    assert main(["propose", str(description), "-o", str(out), "--baseline", str(tmp_path / "base")]) == 0
    tuned = out.read_bytes()
    capsys.readouterr()
    assert main(["propose", str(description), "-o", str(out)]) == 0  # the demo's "re-run propose" hint
    assert out.read_bytes() == tuned  # the data's thresholds stay, byte for byte
    assert "keep the thresholds their baseline gave" in capsys.readouterr().out


def test_thresholds_from_data_never_go_below_the_noise_floor():
    # A reference with no spread (no missing value in four weeks) asks for almost nothing; replacing the
    # conventional threshold with that would page on a single event.
    from stagewatch import plan as plan_mod

    metric = {"id": "scale.input.kg_missing", "statistic": "proportion", "params": {"baseline": 0.001},
              "reads": {"column": "kg", "condition": "missing"}, "warn": 0.01, "critical": 0.02,
              "sizing": {"noise_floor": 0.00469, "warn_noise_floor": 0.0031, "derivation": "x"}}
    from stagewatch.data import contract

    found = {"checks": {metric["id"]: {"signature": contract.signature(metric), "critical": 7.1e-09,
                                       "warn": 6.6e-09, "blocks": 14, "windows": 600, "dispersion": 0.0,
                                       "dispersion_upper": 0.0}}, "period": {"from": "a", "to": "b"}}
    plan_mod._apply_data_thresholds(metric, found, replace=True)
    assert metric["critical"] == 0.0047 and metric["warn"] == 0.0031  # the floors, rounded up to 2 figures
