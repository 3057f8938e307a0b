"""Five weeks of logs for the packhouse demo, generated with a fixed seed (a scenario of our own, invented data).

Traffic follows the packing shifts: busy from 06:00 to 22:00 UTC, a trickle at night, half on weekends. On the
last days the frame gate is retuned: it crops tighter and drops more dark frames. Its own input does not change,
but the images that pass are brighter, the blemish scores lower, more varieties come out unknown, and the grade
mix shifts: the change shows first in the gate's output and then in the stages below it.
"""

from __future__ import annotations

import os
from datetime import datetime, timezone
from typing import Any, Callable

import numpy as np

START = datetime(2026, 10, 2, 14, tzinfo=timezone.utc).timestamp()
DAYS = 35
REFERENCE_DAYS = 28
CHANGE = START + 33 * 86400 - 8 * 3600  # Thursday 06:00 UTC of the fifth week
SEED = 20261002
VARIETIES = ["gala", "fuji", "braeburn", "pink_lady", "unknown"]
GRADES = ["extra", "class_1", "class_2", "juice"]
RESOLUTIONS = ["1920x1080", "1280x720", "2048x1536"]

Columns = dict[str, np.ndarray]


def shift_profile(hours: np.ndarray) -> np.ndarray:
    """Share of peak traffic in each hour since the epoch: packing shifts, quiet nights, half-speed weekends."""
    hour_of_day = hours % 24
    weekday = ((hours // 24) + 3) % 7  # the epoch was a Thursday; 0 = Monday
    day = np.where((hour_of_day >= 6) & (hour_of_day < 22), 1.0, 0.08)
    return day * np.where(weekday >= 5, 0.5, 1.0)


def timestamps(rng: np.random.Generator, per_hour: float) -> np.ndarray:
    hours = np.arange(int(START // 3600), int(START // 3600) + DAYS * 24)
    counts = rng.poisson(per_hour * shift_profile(hours))
    starts = np.repeat(hours * 3600.0, counts)
    return np.sort(starts + rng.uniform(0, 3600, counts.sum()))


def _choice(rng: np.random.Generator, values: list[str], p_before: list[float], p_after: list[float],
            after: np.ndarray) -> np.ndarray:
    before = rng.choice(len(values), size=after.size, p=p_before)
    later = rng.choice(len(values), size=after.size, p=p_after)
    return np.array(values, dtype=object)[np.where(after, later, before)]


def _labels(rng: np.random.Generator, truth: np.ndarray, share: float, error: float, wrong: Callable[[int], Any]
            ) -> np.ndarray:
    out = np.array([None] * truth.size, dtype=object)
    labelled = rng.random(truth.size) < share
    flip = rng.random(truth.size) < error
    out[labelled] = truth[labelled]
    idx = np.flatnonzero(labelled & flip)
    out[idx] = wrong(idx.size)
    return out


def _camera(rng: np.random.Generator, n: int) -> Columns:
    return {"brightness": np.clip(rng.normal(128, 18, n), 0, 255).round(1),
            "resolution": np.array(RESOLUTIONS, dtype=object)[rng.choice(3, n, p=[0.7, 0.25, 0.05])],
            "sharpness": rng.lognormal(5.0, 0.35, n).round(1)}


def _images_after_gate(rng: np.random.Generator, after: np.ndarray) -> Columns:
    n = after.size
    cols = _camera(rng, n)
    cols["brightness"] = np.clip(np.where(after, rng.normal(140, 15, n), rng.normal(131, 17, n)), 0, 255).round(1)
    cols["invariant_violations"] = rng.random(n) < 0.0005
    cols["record_id"] = rng.integers(1, 10**12, n)
    return cols


def stage_columns(stage: str, ts: np.ndarray, rng: np.random.Generator) -> Columns:
    after = ts >= CHANGE
    n = ts.size
    if stage == "line_camera":
        return _camera(rng, n)
    if stage == "frame_gate":
        cols = _camera(rng, n)
        dark = cols["brightness"] < 120
        keep = np.where(after, np.where(dark, 0.45, 0.85), 0.83)
        cols["record_id"] = rng.integers(1, 10**12, n)
        cols["passed"] = rng.random(n) < keep
        cols["clipped_length"] = np.where(after, rng.normal(380, 25, n), rng.normal(410, 25, n)).round(1)
        return cols
    if stage == "variety_tagger":
        cols = _images_after_gate(rng, after)
        variety = _choice(rng, VARIETIES, [0.35, 0.3, 0.2, 0.1, 0.05], [0.33, 0.28, 0.19, 0.1, 0.10], after)
        cols["variety"] = variety
        cols["confidence"] = np.where(after, rng.beta(6, 2.5, n), rng.beta(8, 2, n)).round(4)
        cols["variety_label"] = _labels(rng, variety, 0.01, 0.08,
                                        lambda k: np.array(VARIETIES[:4], dtype=object)[rng.integers(0, 4, k)])
        return cols
    if stage in ("blemish_scorer", "grade_assigner"):
        score = np.where(after, rng.beta(2, 9, n), rng.beta(2, 6, n)).round(4)
        if stage == "blemish_scorer":
            cols = _images_after_gate(rng, after)
            cols["blemish_score"] = score
            truth = (rng.random(n) < score).astype(float)
            cols["blemish_score_label"] = np.where(rng.random(n) < 0.02, truth, np.nan)
            return cols
        weight = np.clip(rng.normal(190, 35, n), 60, 450).round(1)
        weight = np.where(rng.random(n) < 0.003, np.nan, weight)
        variety = _choice(rng, VARIETIES, [0.35, 0.3, 0.2, 0.1, 0.05], [0.33, 0.28, 0.19, 0.1, 0.10], after)
        grade_index = np.digitize(score + rng.normal(0, 0.05, n), [0.15, 0.3, 0.55])
        grade = np.array(GRADES, dtype=object)[grade_index]
        return {"record_id": rng.integers(1, 10**12, n), "variety": variety, "blemish_score": score,
                "weight_g": weight, "predicted_class": grade, "confidence": rng.beta(7, 2, n).round(4),
                "predicted_class_label": _labels(rng, grade, 0.005, 0.1,
                                                 lambda k: np.array(GRADES, dtype=object)[rng.integers(0, 4, k)])}
    if stage == "load_cell":
        weight = np.clip(rng.normal(190, 35, n), 60, 450).round(1)
        return {"weight_g": np.where(rng.random(n) < 0.003, np.nan, weight)}
    if stage == "carton_planner":
        return {"predicted_class": np.array(GRADES, dtype=object)[rng.choice(4, n, p=[0.3, 0.4, 0.2, 0.1])],
                "items_in": rng.poisson(50, n)}  # fruit packed into each carton
    raise KeyError(stage)


def write_logs(plan: dict[str, Any], out_dir: str) -> dict[str, str]:
    """One Parquet file per stage in ``out_dir``; returns stage -> path."""
    import duckdb
    from sqlglot import exp

    from stagewatch.safewrite import resolve_target

    os.makedirs(out_dir, exist_ok=True)
    con = duckdb.connect(":memory:")
    con.execute("SET TimeZone = 'UTC'")
    paths = {}
    for index, stage in enumerate(plan["stages"]):
        rng = np.random.default_rng([SEED, index])
        ts = timestamps(rng, float(stage["volume_per_hour"]))
        table = {"ts_epoch": ts, **stage_columns(stage["id"], ts, rng)}
        for key, value in table.items():
            if value.dtype == object:
                table[key] = np.array([None if v is None else str(v) for v in value], dtype=object)
        path = os.path.join(out_dir, f"{stage['id']}.parquet")
        real = resolve_target(path)  # through a symlink, never over a FIFO or a device
        tmp = real.with_name(f".{real.name}.tmp")
        con.register("frame", table)
        columns = ", ".join(f'"{k}"' for k in table if k != "ts_epoch")  # our own fixed column names
        target = exp.Literal.string(str(tmp)).sql(dialect="duckdb")  # a quoted literal, whatever the directory
        try:
            con.execute(f"COPY (SELECT to_timestamp(ts_epoch) AS timestamp, {columns} FROM frame) TO {target} "
                        "(FORMAT parquet)")
            os.replace(tmp, real)
        finally:
            con.unregister("frame")
            if tmp.exists():
                tmp.unlink()
        paths[stage["id"]] = path
    return paths


def iso(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


REFERENCE_END = START + REFERENCE_DAYS * 86400
