"""calibrate and check end to end: verdicts, exit codes, bad data, and a pipeline nobody wrote the catalog for."""

from __future__ import annotations

import json
import shutil
import subprocess

import pytest
import yaml

from conftest import PIPELINES, stagewatch_command
from datagen import T0, data_args, write_declared_logs
from stagewatch.cli import main
from stagewatch.data import contract
from stagewatch.resources import validator

COLD_STORE = """
pipeline: cold-store
context: business
stages:
  - id: probe
    kind: source
    modality: timeseries
    output: records
    serving: device
    volume_per_hour: 400
    inputs:
      - {name: temp_c, type: numeric, range: [-5, 15]}
      - {name: room, type: category, categories: [r1, r2, r3, r4]}
  - id: spoilage_model
    kind: learned
    modality: tabular
    output: attribute
    upstream: [probe]
    serving: online
    volume_per_hour: 400
    inputs:
      - {name: temp_c, type: numeric, range: [-5, 15]}
      - {name: room, type: category, categories: [r1, r2, r3, r4]}
    outputs:
      - {name: risk, type: category, categories: [low, medium, high], unknown_value: unknown}
"""
DAY = 86400.0
REF_END = "2026-03-14T00:00:00Z"  # 12 days after the logs start


def _iso(seconds: float) -> str:
    from stagewatch.data.sources import format_time

    return format_time(seconds)


@pytest.fixture
def cold_store(tmp_path, write):
    description = write("pipeline.yaml", COLD_STORE)
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(description), "-o", str(plan)]) == 0
    return plan


def _plan(path) -> dict:
    return yaml.safe_load(path.read_text())


def _run_check(capsys, plan, baseline, paths, *extra) -> tuple[int, dict]:
    capsys.readouterr()
    code = main(["check", str(plan), "--baseline", str(baseline), *data_args(paths), "--format", "json", *extra])
    out = capsys.readouterr().out
    doc = json.loads(out)
    validator("check-result").validate(doc)  # the documented schema
    return code, doc


def _calibrate(plan, paths, baseline) -> int:
    return main(["calibrate", str(plan), *data_args(paths), "--to", REF_END, "-o", str(baseline)])


def test_healthy_logs_measure_every_declared_field_and_raise_no_critical(tmp_path, cold_store, capsys):
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs")
    assert _calibrate(cold_store, paths, tmp_path / "base") == 0
    code, doc = _run_check(capsys, cold_store, tmp_path / "base", paths)
    assert code in (0, 1)
    assert not [c for c in doc["checks"] if c["verdict"] == "critical"]
    declared = {"temp_c", "room", "risk"}
    for c in doc["checks"]:
        if c["columns"] and set(c["columns"]) <= declared:
            assert c["verdict"] != "not_measured", c
    assert {c["id"] for c in doc["checks"]} >= {"probe.input.temp_c_drift", "spoilage_model.output.unknown_share"}


def test_a_shift_at_the_source_is_critical_exits_4_and_names_the_source_first(tmp_path, cold_store, capsys):
    start = T0 + 13 * DAY
    changes = {(s, "temp_c"): (start, lambda v: v + 3.0) for s in ("probe", "spoilage_model")}
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs", changes=changes)
    assert _calibrate(cold_store, paths, tmp_path / "base") == 0
    code, doc = _run_check(capsys, cold_store, tmp_path / "base", paths)
    assert code == 4
    verdicts = {c["id"]: c["verdict"] for c in doc["checks"]}
    assert verdicts["probe.input.temp_c_drift"] == "critical"
    assert verdicts["spoilage_model.input.temp_c_drift"] == "critical"
    [origin] = doc["attribution"]
    assert origin["stage"] == "probe" and origin["where"] == "input"
    assert [c["stage"] for c in origin["consequences"]] == ["spoilage_model"]


def test_check_formats_markdown_table_and_openmetrics_pass_their_tools(tmp_path, cold_store, capsys):
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs", hours=24 * 13)
    assert _calibrate(cold_store, paths, tmp_path / "base") == 0
    metrics = tmp_path / "check.prom"
    main(["check", str(cold_store), "--baseline", str(tmp_path / "base"), *data_args(paths),
          "--format", "openmetrics", "-o", str(metrics)])
    text = metrics.read_text()
    assert "stagewatch_check_statistic{" in text and text.endswith("# EOF\n")
    promtool = shutil.which("promtool")
    if promtool:  # `make test` installs it; the real-tool test below requires it
        proc = subprocess.run([promtool, "check", "metrics"], input=text, capture_output=True, text=True)
        assert proc.returncode == 0, proc.stderr + proc.stdout
    capsys.readouterr()
    main(["check", str(cold_store), "--baseline", str(tmp_path / "base"), *data_args(paths), "--format", "markdown"])
    md = capsys.readouterr().out
    assert "| probe.input.temp\\_c\\_drift |" in md
    capsys.readouterr()
    main(["check", str(cold_store), "--baseline", str(tmp_path / "base"), *data_args(paths)])
    table = capsys.readouterr().out
    assert "input.temp_c_drift" in table and "spoilage_model" in table


@pytest.mark.slow
def test_openmetrics_of_check_and_calibrate_pass_promtool_check_metrics(tmp_path, cold_store):
    promtool = shutil.which("promtool")
    assert promtool, "promtool is installed by `make test` (.ci/install-tools)"
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs", hours=24 * 13)
    cmd = stagewatch_command()
    proc = subprocess.run([cmd, "calibrate", str(cold_store), *data_args(paths), "--to", REF_END, "-o",
                           str(tmp_path / "base"), "--format", "openmetrics"], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert 'stagewatch_reference_share{bin="0",check="probe.input.temp_c_drift"' in proc.stdout
    for text in (proc.stdout,):
        check = subprocess.run([promtool, "check", "metrics"], input=text, capture_output=True, text=True)
        assert check.returncode == 0, check.stdout + check.stderr


# --- bad data: a verdict or one clear message, never a traceback ---------------------------------------------

def test_an_empty_window_is_insufficient_and_counts_fall_to_zero(tmp_path, cold_store, capsys):
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs", hours=24 * 13)
    assert _calibrate(cold_store, paths, tmp_path / "base") == 0
    code, doc = _run_check(capsys, cold_store, tmp_path / "base", paths, "--at", _iso(T0 + 40 * DAY))
    verdicts = {c["id"]: c for c in doc["checks"]}
    assert verdicts["probe.input.temp_c_drift"]["verdict"] == "insufficient"
    assert verdicts["probe.output.record_count"]["verdict"] == "critical"  # no rows at all is a real alert
    assert code == 4


def test_all_missing_nan_infinity_and_unseen_categories_get_verdicts(tmp_path, cold_store, capsys):
    start = T0 + 13 * DAY
    import numpy as np

    changes = {("probe", "temp_c"): (start, lambda v: np.where(np.arange(v.size) % 3 == 0, np.inf, np.nan)),
               ("probe", "room"): (start, lambda v: np.where(np.arange(v.size) % 2 == 0, "r9", "cellar"))}
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs", changes=changes)
    assert _calibrate(cold_store, paths, tmp_path / "base") == 0
    code, doc = _run_check(capsys, cold_store, tmp_path / "base", paths)
    checks = {c["id"]: c for c in doc["checks"]}
    assert checks["probe.input.temp_c_drift"]["verdict"] == "insufficient"  # nothing finite to bin
    assert checks["probe.input.temp_c_out_of_range"]["verdict"] == "critical"  # infinity is out of range
    unseen = checks["probe.input.room_unseen"]
    assert unseen["verdict"] == "critical"
    assert [v for v, _ in unseen["detail"]["unseen_values"]] == ["cellar", "r9"]
    assert code == 4


def test_a_log_without_a_column_the_plan_reads_is_not_measured_by_name(tmp_path, cold_store, capsys):
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs", hours=24 * 13)
    assert _calibrate(cold_store, paths, tmp_path / "base") == 0
    import duckdb

    thin = tmp_path / "probe_thin.parquet"
    duckdb.connect().execute(f"COPY (SELECT * EXCLUDE (room) FROM '{paths['probe']}') TO '{thin}' (FORMAT parquet)")
    code, doc = _run_check(capsys, cold_store, tmp_path / "base", {**paths, "probe": str(thin)})
    mix = {c["id"]: c for c in doc["checks"]}["probe.input.room_mix"]
    assert mix["verdict"] == "not_measured" and "room" in mix["words"]
    assert code in (1, 4)


@pytest.mark.parametrize("stamp,expected", [
    ("1772409600", "holds BIGINT"),          # epoch seconds: refused, not guessed
    ("yesterday", "reads as a time"),         # text that is not a time
])
def test_timestamps_that_are_not_timestamps_give_one_message(tmp_path, cold_store, capsys, stamp, expected):
    log = tmp_path / "probe.csv"
    log.write_text("timestamp,temp_c,room\n" + "".join(f"{stamp},{i % 10},r1\n" for i in range(50)))
    code = main(["calibrate", str(cold_store), "--data", f"probe={log}", "-o", str(tmp_path / "base")])
    err = capsys.readouterr().err
    assert code == 2 and expected in err and "Traceback" not in err
    assert not (tmp_path / "base" / "baseline.json").exists()  # nothing written on failure


def test_timestamps_with_offsets_are_read_in_utc(tmp_path, cold_store, capsys):
    log = tmp_path / "probe.csv"
    rows = [f"2026-03-02T{h:02d}:30:00+02:00,{h},r1\n" for h in range(24)]
    log.write_text("timestamp,temp_c,room\n" + "".join(rows))
    assert main(["calibrate", str(cold_store), "--data", f"probe={log}", "-o", str(tmp_path / "base")]) == 0
    body = json.loads((tmp_path / "base" / "baseline.json").read_text())["baseline"]
    assert body["stages"]["probe"]["period"]["from"] == "2026-03-01T22:00:00Z"


def test_a_baseline_from_another_plan_or_edited_or_truncated_is_refused(tmp_path, cold_store, capsys, write):
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs", hours=24 * 13)
    assert _calibrate(cold_store, paths, tmp_path / "base") == 0
    baseline = tmp_path / "base" / "baseline.json"
    original = baseline.read_text()
    other = write("other.yaml", COLD_STORE.replace("pipeline: cold-store", "pipeline: warm-store"))
    other_plan = tmp_path / "other-plan.yaml"
    assert main(["propose", str(other), "-o", str(other_plan)]) == 0
    capsys.readouterr()
    assert main(["check", str(other_plan), "--baseline", str(tmp_path / "base"), *data_args(paths)]) == 2
    assert "made for pipeline 'cold-store'" in capsys.readouterr().err
    baseline.write_text(original.replace('"rows": ', '"rows": 1', 1))
    assert main(["check", str(cold_store), "--baseline", str(tmp_path / "base"), *data_args(paths)]) == 2
    assert "edited or damaged" in capsys.readouterr().err
    baseline.write_text(original[: len(original) // 2])
    assert main(["check", str(cold_store), "--baseline", str(tmp_path / "base"), *data_args(paths)]) == 2
    assert "truncated" in capsys.readouterr().err


def test_usage_errors_name_what_was_expected(tmp_path, cold_store, capsys):
    assert main(["calibrate", str(cold_store), "--data", "probe", "-o", str(tmp_path / "b")]) == 2
    assert "STAGE=PATH" in capsys.readouterr().err
    (tmp_path / "x.csv").write_text("timestamp,temp_c\n2026-03-02T00:00:00Z,1\n")
    assert main(["calibrate", str(cold_store), "--data", f"nowhere={tmp_path / 'x.csv'}", "-o", str(tmp_path / "b")]) == 2
    assert "does not have" in capsys.readouterr().err
    assert main(["calibrate", str(cold_store), "--data", "probe=x.parquet", "-o", str(tmp_path / "b")]) == 2
    assert "no such file" in capsys.readouterr().err
    assert main(["calibrate", str(cold_store), "--data", f"probe={tmp_path}/*.parquet", "-o", str(tmp_path / "b")]) == 2
    assert "no file matches" in capsys.readouterr().err
    (tmp_path / "x.txt").write_text("hello")
    assert main(["calibrate", str(cold_store), "--data", f"probe={tmp_path / 'x.txt'}", "-o", str(tmp_path / "b")]) == 2
    assert "unknown file type" in capsys.readouterr().err


def test_a_changed_check_is_not_judged_against_a_stale_reference(tmp_path, cold_store, capsys):
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs", hours=24 * 13)
    assert _calibrate(cold_store, paths, tmp_path / "base") == 0
    text = cold_store.read_text().replace("bins: 10", "bins: 8", 1)
    cold_store.write_text(text)
    _, doc = _run_check(capsys, cold_store, tmp_path / "base", paths)
    changed = [c for c in doc["checks"] if "re-run calibrate" in c["words"]]
    assert changed and all(c["verdict"] == "not_measured" for c in changed)


# --- pipelines the catalog was not written against ------------------------------------------------------------

@pytest.mark.parametrize("name", ["bikeshare", "parcel_hub"])
def test_an_unseen_pipeline_goes_through_propose_calibrate_check(tmp_path, capsys, name):
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(PIPELINES / f"{name}.yaml"), "-o", str(plan)]) == 0
    doc = _plan(plan)
    paths = write_declared_logs(doc, tmp_path / "logs", hours=24 * 13, per_hour=300)
    assert _calibrate(plan, paths, tmp_path / "base") == 0
    _, result = _run_check(capsys, plan, tmp_path / "base", paths)
    declared = {f["name"] for s in doc["stages"] for f in [*s.get("inputs", []), *s.get("outputs", [])]}
    reading_declared = [c for c in result["checks"] if c["columns"] and set(c["columns"]) <= declared]
    assert reading_declared
    assert all(c["verdict"] != "not_measured" for c in reading_declared)
    # every declared field is read by at least one check
    read = {col for c in reading_declared for col in c["columns"]}
    assert read == declared
    assert contract.log_columns(doc)


def test_the_installed_command_checks_end_to_end(tmp_path, cold_store):
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs", hours=24 * 13)
    cmd = stagewatch_command()
    proc = subprocess.run([cmd, "calibrate", str(cold_store), *data_args(paths), "-o", str(tmp_path / "b")],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    proc = subprocess.run([cmd, "check", str(cold_store), "--baseline", str(tmp_path / "b"), *data_args(paths),
                           "--window", "all", "--format", "json"], capture_output=True, text=True)
    assert proc.returncode in (0, 1), proc.stderr
    assert json.loads(proc.stdout)["summary"]["critical"] == 0  # the reference against itself


def test_outputs_never_land_on_an_input(tmp_path, cold_store, capsys):
    paths = write_declared_logs(_plan(cold_store), tmp_path / "logs", hours=24 * 13)
    assert _calibrate(cold_store, paths, tmp_path / "base") == 0
    before = (tmp_path / "base" / "baseline.json").read_bytes()
    for target in (str(cold_store), paths["probe"], str(tmp_path / "base" / "baseline.json")):
        capsys.readouterr()
        code = main(["check", str(cold_store), "--baseline", str(tmp_path / "base"), *data_args(paths),
                     "--format", "json", "-o", target])
        assert code == 2, target
    assert (tmp_path / "base" / "baseline.json").read_bytes() == before
    assert yaml.safe_load(cold_store.read_text())["pipeline"] == "cold-store"


# --- the whole pipeline's quality check follows the type of the last stage's output ------------------------------

FORECAST = """
pipeline: produce-forecast
context: business
stages:
  - id: orders
    kind: source
    modality: tabular
    output: records
    serving: batch
    volume_per_hour: 60
    inputs:
      - {name: order_kg, type: numeric, range: [0, 500]}
  - id: forecaster
    kind: rule-based
    modality: tabular
    output: value
    upstream: [orders]
    serving: batch
    volume_per_hour: 60
    labels: delayed
    label_delay: 1d
    outputs:
      - {name: forecast_kg, type: numeric}
"""


def test_the_pipeline_quality_of_a_forecast_in_kg_fires_when_its_error_doubles(tmp_path, capsys, write):
    import numpy as np

    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(write("pipeline.yaml", FORECAST)), "-o", str(plan)]) == 0
    [quality] = [m for m in _plan(plan)["pipeline_metrics"] if m.get("on_labels")]
    assert quality["id"] == "pipeline.output.final_absolute_error"
    assert quality["reads"]["transform"] == "abs_error" and quality["statistic"] == "mean"
    rng = np.random.default_rng(7)
    hours = 24 * 14
    times = T0 + np.arange(hours * 60) * 60.0  # one forecast a minute for 14 days
    truth = rng.uniform(50, 400, times.size)
    scale = np.where(times >= T0 + 13 * DAY, 12.0, 6.0)  # the error's spread doubles on the last day
    forecast = np.round(truth + rng.normal(0.0, scale), 3)
    truth = np.round(truth, 3)  # as written to the log
    log = tmp_path / "forecaster.csv"
    log.write_text("timestamp,forecast_kg,forecast_kg_label\n" + "".join(
        f"{_iso(t)},{f:.3f},{y:.3f}\n" for t, f, y in zip(times, forecast, truth)))
    orders = tmp_path / "orders.csv"
    orders.write_text("timestamp,order_kg\n" + "".join(f"{_iso(t)},{y:.3f}\n" for t, y in zip(times, truth)))
    paths = {"orders": str(orders), "forecaster": str(log)}
    # A share of forecasts that "disagree" with their label (differ by 0.5 kg or more) is nearly one before and
    # after the change (numpy on the same rows), so a share of disagreements could not rise enough to fire.
    err = np.abs(forecast - truth)
    before, after = err[times < T0 + 12 * DAY], err[times >= T0 + 13 * DAY]
    assert (before >= 0.5).mean() > 0.9 and (after >= 0.5).mean() > 0.9
    assert _calibrate(plan, paths, tmp_path / "base") == 0
    code, doc = _run_check(capsys, plan, tmp_path / "base", paths)
    [check] = [c for c in doc["checks"] if c["id"] == quality["id"]]
    assert check["verdict"] == "critical", json.dumps(check)
    assert code == 4
    # the mean absolute error it judged is numpy's on the rows of its window
    from datetime import datetime

    end = datetime.fromisoformat(doc["at"].replace("Z", "+00:00")).timestamp()
    window = err[(times > end - 3600) & (times <= end)]
    assert check["window"] == "1h" and check["n"] == window.size
    assert check["detail"]["mean"] == pytest.approx(window.mean(), rel=1e-9)
