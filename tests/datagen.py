"""Logs for tests, generated from a plan's declared fields alone (no knowledge of the catalog's extra columns).

Each stage gets one row per item at a flat rate, one column per declared input and output field: numbers inside
their declared range, categories from their declared list (or four made-up ones) plus the unknown value now and
then, flags, texts and durations. ``changes`` applies a change to one column from a time on.
"""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

import numpy as np

T0 = datetime(2026, 3, 2, tzinfo=timezone.utc).timestamp()  # a Monday


def _column(rng: np.random.Generator, spec: dict[str, Any], n: int) -> np.ndarray:
    kind = spec["type"]
    if kind == "numeric":
        lo, hi = spec.get("range", [0.0, 100.0])
        return np.clip(rng.normal((lo + hi) / 2, (hi - lo) / 8, n), lo, hi)
    if kind == "duration":
        return rng.exponential(30.0, n)
    if kind == "flag":
        return rng.random(n) < 0.1
    if kind == "text":
        words = np.array(["north", "quay", "road", "12", "unit", "b", "lane"], dtype=object)
        return np.array([" ".join(words[rng.integers(0, 7, rng.integers(2, 6))]) for _ in range(n)], dtype=object)
    values = list(spec.get("categories") or ["alpha", "beta", "gamma", "delta"])
    p = np.array([0.4, 0.3, 0.2, 0.1][: len(values)] + [0.1] * max(0, len(values) - 4), dtype=float)
    out = np.array(values, dtype=object)[rng.choice(len(values), n, p=p / p.sum())]
    if spec.get("unknown_value") is not None:
        out[rng.random(n) < 0.05] = str(spec["unknown_value"])
    return out


def write_declared_logs(plan: dict[str, Any], out: Path, *, hours: int = 24 * 14, per_hour: int = 400,
                        seed: int = 0, changes: dict[tuple[str, str], tuple[float, Callable]] | None = None
                        ) -> dict[str, str]:
    """One Parquet file per stage with declared fields; ``changes[(stage, column)] = (from_time, fn(values))``."""
    import duckdb

    out.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect()
    paths = {}
    for index, stage in enumerate(plan["stages"]):
        rng = np.random.default_rng([seed, index])
        n = hours * per_hour
        ts = np.sort(T0 + rng.uniform(0, hours * 3600.0, n))
        table: dict[str, np.ndarray] = {"ts_epoch": ts}
        for spec in [*stage.get("inputs", []), *stage.get("outputs", [])]:
            if spec["name"] not in table:
                table[spec["name"]] = _column(rng, spec, n)
        if len(table) == 1:
            table["row"] = np.arange(n)
        for (sid, column), (start, fn) in (changes or {}).items():
            if sid == stage["id"]:
                later = ts >= start
                table[column] = np.where(later, fn(table[column]), table[column])
        for key, value in table.items():
            if value.dtype == object:
                table[key] = np.array([None if v is None else str(v) for v in value], dtype=object)
        con.register("frame", table)
        cols = ", ".join('"' + k.replace('"', '""') + '"' for k in table if k != "ts_epoch")
        path = out / f"{stage['id']}.parquet"
        con.execute(f"COPY (SELECT to_timestamp(ts_epoch) AS timestamp, {cols} FROM frame) TO '{path}' (FORMAT parquet)")
        con.unregister("frame")
        paths[stage["id"]] = str(path)
    return paths


def data_args(paths: dict[str, str]) -> list[str]:
    out: list[str] = []
    for stage, path in paths.items():
        out += ["--data", f"{stage}={path}"]
    return out
