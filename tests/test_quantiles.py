"""Calibrate's exact quantiles from grouped counts (src/stagewatch/data/quantiles.py).

The reference for every value is ``numpy.quantile`` (method "linear", numpy's default) on the same finite values
read straight from the Parquet file: equal bit for bit. DuckDB's own ``quantile_cont`` (the function calibrate
used before) is the second source: the same definition, so within a few units in the last place (its
interpolation rounds differently). The files are written by DuckDB from numpy arrays.
"""

from __future__ import annotations

import math

import duckdb
import numpy as np
import pandas as pd
import pytest

from stagewatch.data import aggregates as ag
from stagewatch.data import quantiles, scan
from stagewatch.data.engines import DuckDBEngine, Location

N = 60_000
T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z
LEVELS = [i / 100 for i in range(1, 100)] + [0.0, 0.25, 0.5, 0.95, 1.0, 1 / 3]


@pytest.fixture(scope="module")
def log(tmp_path_factory):
    """Columns that are hard for a grid: a heavy tail with far outliers, ties, NaN, infinity and NULL; values
    that differ only in the last bits; one value repeated; a column of integers; a column with one value."""
    rng = np.random.default_rng(20261202)
    heavy = rng.lognormal(0, 3, N)
    heavy[::997] = 1e15
    heavy[::499] = -1e12
    heavy[::7] = np.round(heavy[::7])
    heavy[5::103] = np.inf
    heavy[9::107] = -np.inf
    ties = np.round(rng.normal(size=N), 1)
    close = 1.0 + rng.integers(0, 50, N) * np.finfo(float).eps
    counts = rng.poisson(3, N)
    single = np.full(N, 2.5)
    path = tmp_path_factory.mktemp("quantiles") / "log.parquet"
    raw = pd.DataFrame({"i": np.arange(N), "heavy": heavy, "ties": ties, "close": close,
                        "counts": counts.astype(np.int64), "single": single})
    con = duckdb.connect()
    con.register("raw", raw)
    # NaN written by DuckDB itself (a NaN from pandas would arrive as NULL)
    con.execute(f"COPY (SELECT to_timestamp({T0} + i * 10) AS timestamp, * EXCLUDE (i, heavy, ties), "
                f"CASE WHEN i % 101 = 3 THEN 'nan'::DOUBLE ELSE heavy END AS heavy, "
                f"CASE WHEN i % 17 = 0 THEN NULL WHEN i % 13 = 0 THEN 'nan'::DOUBLE ELSE ties END AS ties "
                f"FROM raw ORDER BY i) TO '{path}' (FORMAT parquet)")
    return str(path)


def _hex(values) -> list[str]:
    """Bits of each value, zero's sign aside (-0.0 equals 0.0; numpy keeps whichever its sort met)."""
    return [(float(x) + 0.0).hex() for x in values]


def _values(path: str, column: str, start: float | None = None) -> np.ndarray:
    """The column's finite values in the period, read by DuckDB straight from the file."""
    con = duckdb.connect()
    where = "" if start is None else f" WHERE epoch(timestamp) > {start}"
    got = np.array([r[0] for r in con.execute(f"SELECT CAST({column} AS DOUBLE) FROM '{path}'{where}").fetchall()
                    if r[0] is not None], dtype=float)
    return got[np.isfinite(got)]


def _profile(path: str, column: str, start: float | None = None) -> tuple[list[float], list[int]]:
    """Calibrate's quantiles of the column, and the number of rows each query returned."""
    engine = DuckDBEngine()
    source = engine.open("stage", Location("data", path), "timestamp", 0)
    returned: list[int] = []
    run = engine.rows

    def counted(src, query):
        rows = run(src, query)
        returned.append(len(rows))
        return rows

    engine.rows = counted  # type: ignore[method-assign]
    numeric = {column: (ag.number(column, None, True), LEVELS)}
    return scan.profile(engine, source, numeric, [], start, None, 10)[column]["quantiles"], returned


@pytest.mark.parametrize("column", ["heavy", "ties", "close", "counts", "single"])
def test_quantiles_equal_numpys_bit_for_bit(log, column):
    got, returned = _profile(log, column)
    expected = np.quantile(_values(log, column), LEVELS)  # numpy, method "linear"
    assert _hex(got) == _hex(expected)
    assert max(returned) <= quantiles.FETCH_AT_MOST * 2 * len(LEVELS)  # cells and their values, never the column


def test_duckdbs_quantile_cont_has_the_same_definition(log):
    got, _ = _profile(log, "heavy")
    con = duckdb.connect()
    theirs = con.execute(f"SELECT quantile_cont(heavy, ?::DOUBLE[]) FROM '{log}' WHERE isfinite(heavy)",
                         [LEVELS]).fetchone()[0]  # DuckDB's own exact quantiles
    assert all(abs(a - b) <= 4 * math.ulp(b) for a, b in zip(got, theirs))


def test_every_grid_and_the_last_resort_give_the_same_values(log, monkeypatch):
    """Tiny grids make every wanted cell too large until the last grid, then fetch: still numpy's values. The
    period starts inside the file, as calibrate's --from does."""
    start = T0 + 10 * 5000
    expected = _hex(np.quantile(_values(log, "heavy", start), LEVELS))
    monkeypatch.setattr(quantiles, "GRID", 8)
    monkeypatch.setattr(quantiles, "FETCH_AT_MOST", 4)
    got, returned = _profile(log, "heavy", start)
    assert _hex(got) == expected
    assert len(returned) > 4  # the moments, three grids and a fetch
    monkeypatch.setattr(quantiles, "GRIDS", 1)
    got, _ = _profile(log, "heavy", start)
    assert _hex(got) == expected


def test_positions_and_interpolation_follow_numpy():
    rng = np.random.default_rng(7)
    for _ in range(2000):
        n = int(rng.integers(1, 40))
        x = np.sort(rng.normal(size=n) * 10.0 ** int(rng.integers(-6, 6)))
        p = float(rng.choice([rng.random(), 0.0, 1.0, 0.5]))
        j, j1, g = quantiles.positions(n, p)
        assert _hex([quantiles.interpolate(float(x[j]), float(x[j1]), g)]) == _hex([np.quantile(x, p)])
