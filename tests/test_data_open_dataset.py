"""A baseline from one season of real weather flags the next season, and not the same season a year later.

Data: Seattle daily weather 2012-2015 (NOAA, via the vega_datasets PyPI package, version 0.9.0, file
``seattle-weather.csv`` shipped inside the package). Season means of temp_max, measured on the file with DuckDB:
Jan-Mar 2012 8.61 C (sd 3.32), Jul-Aug 2012 24.38 C, Jan-Mar 2013 9.43 C: summer sits about 4.7 reference standard
deviations above the winter reference, the next winter about 0.25.

Periods and windows are half-open, (start, end]: the file stamps each day at midnight, so the windows end at noon
to hold whole days.
"""

from __future__ import annotations

import importlib.util
import json
from pathlib import Path

import pytest

from stagewatch.cli import main

PIPELINE = """
pipeline: seattle-weather
context: consumer
stages:
  - id: weather_station
    kind: source
    modality: timeseries
    output: records
    serving: batch
    run_every: 1d
    volume_per_hour: 0.05
    inputs:
      - {name: temp_max, type: numeric, range: [-20, 50]}
      - {name: wind, type: numeric, range: [0, 30]}
      - {name: weather, type: category, categories: [drizzle, rain, sun, snow, fog]}
"""


def _dataset() -> Path:
    spec = importlib.util.find_spec("vega_datasets")  # located without importing it (it imports pandas)
    assert spec and spec.submodule_search_locations, "vega_datasets is a test dependency"
    path = Path(list(spec.submodule_search_locations)[0]) / "_data" / "seattle-weather.csv"
    assert path.is_file()
    return path


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory):
    work = tmp_path_factory.mktemp("weather")
    (work / "pipeline.yaml").write_text(PIPELINE)
    plan = work / "plan.yaml"
    assert main(["propose", str(work / "pipeline.yaml"), "-o", str(plan)]) == 0
    data = ["--data", f"weather_station={_dataset()}", "--time-column", "date"]
    assert main(["calibrate", str(plan), *data, "--from", "2011-12-31T12:00", "--to", "2012-03-31T12:00",
                 "-o", str(work / "base")]) == 0
    return plan, work / "base", data


def _check(capsys, calibrated, at: str, window: str) -> tuple[int, dict]:
    plan, base, data = calibrated
    capsys.readouterr()
    code = main(["check", str(plan), "--baseline", str(base), *data, "--at", at, "--window", window,
                 "--format", "json"])
    return code, {c["id"]: c for c in json.loads(capsys.readouterr().out)["checks"]}


def test_summer_against_a_winter_baseline_is_critical(calibrated, capsys):
    code, checks = _check(capsys, calibrated, "2012-08-31T12:00", "62d")
    level = checks["weather_station.input.level_shift"]
    assert level["verdict"] == "critical"
    assert level["value"] == pytest.approx(4.7, abs=0.2)  # (24.38 - 8.61) / 3.32 from the file itself
    assert level["n"] == 62
    assert code == 4


def test_the_same_season_a_year_later_stays_below_critical(calibrated, capsys):
    code, checks = _check(capsys, calibrated, "2013-03-31T12:00", "90d")
    critical = {k for k, c in checks.items() if c["verdict"] == "critical"}
    # The weather labels really did change: Jan-Mar 2012 has 15 snow days and 4 drizzle days, Jan-Mar 2013 has 2
    # and 13 (counted in the file with DuckDB). The category mix check says so; every temperature and wind check
    # stays below critical.
    assert critical == {"weather_station.input.weather_mix"}
    assert "'snow'" in checks["weather_station.input.weather_mix"]["words"] or \
        "'drizzle'" in checks["weather_station.input.weather_mix"]["words"]
    level = checks["weather_station.input.level_shift"]
    assert level["value"] == pytest.approx(0.25, abs=0.05)  # (9.43 - 8.61) / 3.32
    # 90 daily rows are too few for a 10-bin PSI: said so, never reported as all clear
    assert checks["weather_station.input.temp_max_drift"]["verdict"] == "insufficient"
    assert code == 4


def test_replay_over_a_year_agrees_with_numpy_on_the_raw_file_and_times_an_injected_change(calibrated):
    import csv
    from datetime import datetime, timezone

    import numpy as np

    from stagewatch.data.replay import run_replay

    plan, base, data = calibrated
    path = data[1].split("=", 1)[1]
    result = run_replay(str(plan), str(base), {"weather_station": path}, start="2012-12-31T12:00",
                        end="2013-12-31T12:00", time_column="date")
    level = next(c for c in result.checks if c.id == "weather_station.input.level_shift")
    assert level.evaluations >= 5 and level.critical_firings >= 1  # the summer, against a winter reference
    assert level.per_week(level.critical_firings) == pytest.approx(level.critical_firings / (365 / 7), rel=1e-9)
    with open(path, newline="") as handle:
        rows = list(csv.DictReader(handle))
    stamps = np.array([datetime.strptime(r["date"], "%Y/%m/%d").replace(tzinfo=timezone.utc).timestamp()
                       for r in rows])
    temp = np.array([float(r["temp_max"]) for r in rows])
    ref = json.loads((base / "baseline.json").read_text())["baseline"]["stages"]["weather_station"]["checks"][
        level.id]
    seconds = {"1d": 86400, "7d": 604800, "30d": 2592000}.get(level.window) or int(level.window[:-1]) * 86400
    for t, value in zip(level.times, level.values):
        inside = (stamps > t - seconds) & (stamps <= t)
        assert value == pytest.approx((temp[inside].mean() - ref["mean"]) / ref["sd"], rel=1e-12)
    changed = run_replay(str(plan), str(base), {"weather_station": path}, start="2012-12-31T12:00",
                         end="2013-03-31T12:00", time_column="date",
                         injection="weather_station.temp_max=shift:5@2013-02-01")
    shifted = next(c for c in changed.checks if c.id == level.id)
    assert shifted.detection_delay_s is not None and shifted.detection_delay_s <= seconds
