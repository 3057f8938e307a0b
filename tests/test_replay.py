"""replay: every evaluation recomputed from raw values with numpy, agreement with `check`, detection delays that
fall as the change grows, exit codes."""

from __future__ import annotations

import json

import duckdb
import numpy as np
import pytest
import yaml

from datagen import T0, data_args, write_declared_logs
from stagewatch.cli import main
from stagewatch.data.replay import run_replay
from stagewatch.data.sources import format_time
from test_data_check import COLD_STORE, REF_END

DAY = 86400.0
PERIOD = ["--from", format_time(T0), "--to", format_time(T0 + 14 * DAY)]


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    work = tmp_path_factory.mktemp("store")
    (work / "pipeline.yaml").write_text(COLD_STORE)
    plan = work / "plan.yaml"
    assert main(["propose", str(work / "pipeline.yaml"), "-o", str(plan)]) == 0
    paths = write_declared_logs(yaml.safe_load(plan.read_text()), work / "logs")
    assert main(["calibrate", str(plan), *data_args(paths), "--to", REF_END, "-o", str(work / "base")]) == 0
    return plan, work / "base", paths


def _raw(path: str) -> tuple[np.ndarray, np.ndarray]:
    con = duckdb.connect()
    ts, temp = zip(*con.execute(f"SELECT epoch(timestamp), temp_c FROM '{path}'").fetchall())
    return np.array(ts, float), np.array([np.nan if v is None else v for v in temp], float)


def test_every_replayed_value_equals_numpy_on_the_raw_rows_and_check_at_that_time(store, capsys):
    plan, base, paths = store
    result = run_replay(str(plan), str(base), paths, start=PERIOD[1], end=PERIOD[3])
    level = next(c for c in result.checks if c.id == "probe.input.level_shift")
    ref = json.loads((base / "baseline.json").read_text())["baseline"]["stages"]["probe"]["checks"][level.id]
    ts, temp = _raw(paths["probe"])
    seconds = {"1h": 3600, "2h": 7200, "3h": 10800, "6h": 21600}[level.window]
    assert level.evaluations == pytest.approx(14 * DAY / seconds, abs=1)
    for t, value in zip(level.times, level.values):
        inside = (ts > t - seconds) & (ts <= t) & np.isfinite(temp)
        direct = (temp[inside].mean() - ref["mean"]) / ref["sd"]  # numpy on the raw rows
        assert value == pytest.approx(direct, rel=1e-9, abs=1e-12)
    # `check` at one evaluation time gives the same value
    t = level.times[len(level.times) // 2]
    capsys.readouterr()
    main(["check", str(plan), "--baseline", str(base), *data_args(paths), "--at", format_time(t), "--format", "json"])
    checked = {c["id"]: c for c in json.loads(capsys.readouterr().out)["checks"]}
    assert checked[level.id]["value"] == pytest.approx(level.values[len(level.times) // 2], rel=1e-9)


def test_detection_delay_falls_as_the_shift_grows(store):
    plan, base, paths = store
    at = T0 + 13 * DAY + 3 * 3600
    delays = {}
    for size in (0.5, 1.0, 2.0):
        result = run_replay(str(plan), str(base), paths, start=format_time(T0 + 12 * DAY),
                            end=format_time(T0 + 14 * DAY), cadence="1m",
                            injection=f"probe.temp_c=shift:{size}@{format_time(at)}")
        check = next(c for c in result.checks if c.id == "probe.input.level_shift")
        delays[size] = check.detection_delay_s
        assert [g["stage"] for g in result.attribution][:1] == ["probe"]
    assert delays[2.0] is not None and delays[1.0] is not None
    assert delays[2.0] <= delays[1.0] <= (delays[0.5] if delays[0.5] is not None else float("inf"))
    assert delays[2.0] < delays[1.0] or delays[1.0] == 60.0


def test_sliding_evaluation_counts_minutes_and_episodes_never_exceed_firings(store):
    plan, base, paths = store
    result = run_replay(str(plan), str(base), paths, start=format_time(T0 + 12 * DAY),
                        end=format_time(T0 + 13 * DAY), cadence="1m")
    for c in result.checks:
        assert c.evaluations == pytest.approx(1440, abs=1)
        assert c.episodes <= c.warn_firings + c.critical_firings


def test_pages_over_budget_exit_1_and_json_reports_the_pipeline(store, capsys, tmp_path):
    plan, base, paths = store
    capsys.readouterr()
    code = main(["replay", str(plan), "--baseline", str(base), *data_args(paths), *PERIOD, "--format", "json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == (1 if doc["pipeline"]["over_budget"] else 0)
    # a page-severity share that jumps: the pipeline goes over its budget of one false page a week
    code = main(["replay", str(plan), "--baseline", str(base), *data_args(paths), *PERIOD, "--format", "json",
                 "--inject", f"probe.temp_c=missing:0.5@{format_time(T0 + 7 * DAY)}"])
    doc = json.loads(capsys.readouterr().out)
    assert doc["pipeline"]["over_budget"] and code == 1
    missing = next(c for c in doc["checks"] if c["id"] == "probe.input.temp_c_missing")
    assert missing["critical_firings"] > 0 and "C" in missing["timeline"]
    assert doc["injection"]["detection"]["probe.input.temp_c_missing"] is not None


@pytest.mark.parametrize("bad,expected", [
    ("probe.temp_c=shift:1", "is not a change"),
    ("probe.temp_c=melt:1@2026-03-10", "unknown kind"),
    ("probe.temp_c=missing:3@2026-03-10", "(0, 1]"),
    ("probe.nope=shift:1@2026-03-10", "no column 'nope'"),
])
def test_bad_injections_give_one_message(store, capsys, bad, expected):
    plan, base, paths = store
    capsys.readouterr()
    assert main(["replay", str(plan), "--baseline", str(base), *data_args(paths), *PERIOD, "--inject", bad]) == 2
    assert expected in capsys.readouterr().err


def test_several_sizes_print_a_detection_delay_table(store, capsys):
    plan, base, paths = store
    at = format_time(T0 + 13 * DAY + 3 * 3600)
    capsys.readouterr()
    code = main(["replay", str(plan), "--baseline", str(base), *data_args(paths), "--from",
                 format_time(T0 + 12 * DAY), "--to", format_time(T0 + 14 * DAY), "--format", "json",
                 "--inject", f"probe.temp_c=shift:0.5,1,3@{at}"])
    rows = json.loads(capsys.readouterr().out)
    assert code == 0 and [r["change"].split(":")[1].split("@")[0] for r in rows] == ["0.5", "1", "3"]
    delays = [r["detection_delay_s"]["probe.input.level_shift"] for r in rows]
    assert delays[2] is not None and all(d is None or d >= delays[2] for d in delays)


def _draws(micros: np.ndarray) -> np.ndarray:
    """The injection's row draw as its docstring defines it, in numpy (int64: every product stays under 2^63)."""
    p = 2147483647
    x = np.mod(micros, p)  # numpy's mod is non-negative for a positive divisor, as ((u % p) + p) % p
    x = np.mod(x * 48271, p)
    x = np.mod(x * x + 1013904223, p)
    return x.astype(float) / float(p)


@pytest.mark.parametrize("kind", ["volume", "missing"])
def test_injected_rows_are_those_the_documented_draw_picks(store, kind):
    """The rows a `volume` change drops (or a `missing` change empties) are exactly those whose draw, computed
    in numpy from the timestamps DuckDB reads from the file, falls below the share, from the change on."""
    from stagewatch.data import inject
    from stagewatch.data.engines import DuckDBEngine, Location

    _, _, paths = store
    at, share = T0 + 3 * DAY, 0.3
    engine = DuckDBEngine()
    source = engine.open("probe", Location("data", paths["probe"]), "timestamp", 0)
    change = inject.parse(f"probe.temp_c={kind}:{share}@{format_time(at)}")
    changed = inject.apply(engine, source, change, {})
    con = duckdb.connect()
    micros, temp = (np.array(v) for v in zip(*con.execute(
        f"SELECT epoch_us(timestamp), temp_c IS NULL FROM '{paths['probe']}' ORDER BY 1").fetchall()))
    picked = (micros >= at * 1e6) & (_draws(micros.astype(np.int64)) < share)
    assert 0.2 < picked[micros >= at * 1e6].mean() < 0.4
    if kind == "volume":
        kept = [r[0] for r in engine.con.execute(f"SELECT epoch_us(timestamp) FROM {changed.view} ORDER BY 1").fetchall()]
        assert kept == micros[~picked].tolist()
    else:
        empty = [r[0] for r in engine.con.execute(f"SELECT temp_c IS NULL FROM {changed.view} "
                                                  f"ORDER BY epoch_us(timestamp)").fetchall()]
        assert empty == (picked | temp.astype(bool)).tolist()


def test_a_check_that_never_has_its_samples_is_never_measured_not_as_planned(store, tmp_path):
    plan, base, paths = store
    data = yaml.safe_load(plan.read_text())
    for stage in data["stages"]:
        for m in stage["metrics"]:
            if m["id"] == "probe.input.level_shift":
                m["window"] = "1m"  # a handful of readings a minute: under the 30 a mean needs (common practice)
    edited = tmp_path / "edited.yaml"
    edited.write_text(yaml.safe_dump(data, sort_keys=False))
    result = run_replay(str(edited), str(base), paths, start=PERIOD[1], end=PERIOD[3])
    level = next(c for c in result.checks if c.id == "probe.input.level_shift")
    assert level.evaluations > 0 and level.insufficient == level.evaluations
    assert level.verdict == "never measured"
    from stagewatch.data.replay_report import summary_lines

    assert any("never measured" in line and level.id in line for line in summary_lines(result))


def test_a_fixed_limit_is_judged_as_one_not_as_too_few_windows():
    from stagewatch.data.replay import FIXED_LIMIT, _verdict

    # 8,064 five-minute windows over four weeks: plenty; a fixed limit simply has no planned noise rate.
    assert _verdict(3, None, 4.0, 8064) == (FIXED_LIMIT, None)
    assert _verdict(3, 0.5, 4.0, 3)[0] == "too few windows to say"
    assert _verdict(0, 0.5, 4.0, 8064)[0] == "as planned"
