"""Statistics computed from the scan's counts against scipy and numpy on the same raw data.

The counts come from DuckDB through the same aggregates `check` runs; the reference values come from scipy
(`ks_2samp`, `chi2_contingency`) and from a direct numpy computation on the raw samples.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as st

from stagewatch import binned
from stagewatch.data import aggregates as ag
from stagewatch.data import scan
from stagewatch.data.engines import DuckDBEngine, Location
from stagewatch.data.sources import Source
from stagewatch.data.measures import Measure


def _source(tmp_path, table: dict[str, np.ndarray]) -> tuple[DuckDBEngine, Source]:
    engine = DuckDBEngine()
    path = tmp_path / "log.parquet"
    frame = {"ts": np.arange(len(next(iter(table.values()))), dtype=float), **table}
    engine.con.register("frame", frame)
    cols = ", ".join(f'"{k}"' for k in table)
    engine.con.execute(f"COPY (SELECT to_timestamp(ts) AS timestamp, {cols} FROM frame) TO '{path}' (FORMAT parquet)")
    engine.con.unregister("frame")
    return engine, engine.open("s", Location("data", str(path)), "timestamp", 0)


def _counts(con, source, measure: Measure, ref: dict) -> dict[str, float]:
    aggregates = measure.aggregates(ref)
    return scan.run(con, source, aggregates)[-1]


def _metric(statistic: str, reads: dict, **params) -> dict:
    return {"id": "s.input.x", "layer": "input", "statistic": statistic, "params": params, "reads": reads,
            "direction": "above"}


@pytest.mark.parametrize("shift", [0.0, 0.3, 1.0])
def test_binned_ks_is_within_its_stated_bound_of_scipy_ks_2samp(tmp_path, shift):
    rng = np.random.default_rng(1)
    ref, win = rng.normal(0, 1, 20000), rng.normal(shift, 1.2, 3000)
    con, source = _source(tmp_path, {"x": np.concatenate([ref, win])})
    measure = Measure(_metric("ks", {"column": "x"}), {"x"})
    edges = measure.reference({"quantiles": list(np.quantile(ref, measure.probabilities()))})
    # reference and window counts on the reference's edges, as calibrate and check take them
    rc = np.histogram(ref, bins=[-np.inf, *edges["edges"], np.inf])[0]
    counts = _counts(con, source, measure, edges)
    total = np.array([counts[f"bin{i}"] for i in range(len(rc))])
    wc = total - rc
    binned_d = binned.ks_from_counts(rc, wc)
    exact = st.ks_2samp(ref, win).statistic  # scipy
    bound = binned.ks_binning_error(rc, wc)
    assert binned_d <= exact + 1e-12
    assert exact - binned_d <= bound


def test_bin_and_category_counts_equal_numpy_on_the_raw_values(tmp_path):
    rng = np.random.default_rng(2)
    x = rng.normal(10, 3, 5000)
    x[:7] = np.nan
    x[7:9] = np.inf
    cats = np.array(["a", "b", "c", "d"], dtype=object)[rng.integers(0, 4, 5000)]
    con, source = _source(tmp_path, {"x": x, "c": cats})
    psi = Measure(_metric("psi", {"column": "x"}, bins=10), {"x"})
    edges = {"edges": [6.0, 8.0, 10.0, 12.0]}
    counts = _counts(con, source, psi, edges)
    finite = x[np.isfinite(x)]
    # np.histogram closes bins on the left as the scan does (values equal to an edge go to the upper bin)
    expected = np.histogram(finite, bins=[-np.inf, *edges["edges"], np.inf])[0]
    assert [counts[f"bin{i}"] for i in range(5)] == expected.tolist()
    mix = Measure(_metric("chi_square", {"column": "c"}, categories=3), set())
    counts = _counts(con, source, mix, {"categories": ["a", "b"]})
    assert [counts["cat0"], counts["cat1"], counts["cat2"]] == [
        int((cats == "a").sum()), int((cats == "b").sum()), int(np.isin(cats, ["c", "d"]).sum())]


def test_category_mix_w_matches_scipy_chi2_contingency():
    ref = np.array([500, 300, 150, 50])
    win = np.array([90, 70, 30, 10])
    chi2 = st.chi2_contingency(np.vstack([ref, win]), correction=False)[0]  # scipy
    n_eff = ref.sum() * win.sum() / (ref.sum() + win.sum())
    assert binned.effect_size_w(ref, win) == pytest.approx(np.sqrt(chi2 / n_eff), rel=1e-12)


def test_psi_from_counts_matches_a_direct_numpy_computation():
    ref = np.array([100, 200, 300, 400, 0])
    win = np.array([150, 150, 250, 400, 50])
    e = (ref + 0.5) / (ref + 0.5).sum()
    a = (win + 0.5) / (win + 0.5).sum()
    assert binned.psi(ref, win) == pytest.approx(float(np.sum((a - e) * np.log(a / e))), rel=1e-12)


def test_shares_from_the_scan_equal_numpy_and_scipy_binomtest(tmp_path):
    rng = np.random.default_rng(3)
    x = rng.normal(50, 20, 4000)
    kind = rng.choice(["value", "nan", "inf", "empty"], size=4000, p=[0.94, 0.02, 0.02, 0.02])
    text = [f"{v:.6f}" if k == "value" else ("" if k == "empty" else k) for v, k in zip(x, kind)]
    path = tmp_path / "log.csv"
    path.write_text("timestamp,x\n" + "".join(f"2026-01-01T00:00:{i % 60:02d}Z,{t}\n"
                                               for i, t in enumerate(text)))
    con = DuckDBEngine()
    source = con.open("s", Location("data", str(path)), "timestamp", 0)
    value = np.where(kind == "value", x, np.nan)
    out_of_range = int(np.sum((kind == "value") & ((x < 0) | (x > 100)))) + int(np.sum(kind == "nan")) \
        + int(np.sum(kind == "inf"))
    m = Measure(_metric("proportion", {"column": "x", "condition": "out_of_range", "range": [0, 100]}), {"x"})
    counts = _counts(con, source, m, {})
    assert counts["matches"] == out_of_range and counts["n"] == 4000
    # scipy's binomtest reports the same observed share
    assert st.binomtest(int(counts["matches"]), int(counts["n"])).statistic == pytest.approx(out_of_range / 4000)
    m = Measure(_metric("proportion", {"column": "x", "condition": "missing"}), {"x"})
    assert _counts(con, source, m, {})["matches"] == int(np.sum(kind == "empty"))
    m = Measure(_metric("level", {"column": "x", "condition": "nonfinite"}), {"x"})
    assert _counts(con, source, m, {})["matches"] == int(np.sum((kind == "nan") | (kind == "inf")))
    m = Measure(_metric("psi", {"column": "x"}, bins=4), {"x"})
    counts = _counts(con, source, m, {"edges": [30.0, 50.0, 70.0]})
    finite = value[np.isfinite(value)]
    assert [counts[f"bin{i}"] for i in range(4)] == np.histogram(finite, [-np.inf, 30, 50, 70, np.inf])[0].tolist()


def test_mean_shift_from_sums_matches_numpy(tmp_path):
    rng = np.random.default_rng(4)
    x = rng.normal(3, 2, 3000)
    con, source = _source(tmp_path, {"x": x})
    m = Measure(_metric("mean", {"column": "x"}), {"x"})
    ref = {"mean": 2.5, "sd": 2.0, "n": 10000}
    result = m.evaluate(ref, _counts(con, source, m, ref))
    assert result.value == pytest.approx((x.mean() - 2.5) / 2.0, rel=1e-9)


def test_identifiers_and_literals_are_quoted_by_sqlglot():
    hostile = 'x"; DROP TABLE t; --'
    sql = ag.sql(ag.select("log_0", [ag.Aggregate("a", ag.count_if(
        ag.category_conditions(ag.text(hostile), ["it's"])[0]))]))
    assert '"x""; DROP TABLE t; --"' in sql and "'it''s'" in sql


def test_two_checks_binning_one_column_on_the_same_edges_both_get_the_counts(tmp_path):
    rng = np.random.default_rng(6)
    x = rng.normal(0, 1, 2000)
    con, source = _source(tmp_path, {"x": x})
    edges = {"edges": [-1.0, 0.0, 1.0]}
    one = [a.renamed("one#" + a.key) for a in Measure(_metric("psi", {"column": "x"}, bins=4), {"x"}).aggregates(edges)]
    two = [a.renamed("two#" + a.key) for a in Measure(_metric("psi", {"column": "x"}, bins=4), {"x"}).aggregates(edges)]
    counts = scan.run(con, source, one + two)[-1]
    expected = np.histogram(x, [-np.inf, -1.0, 0.0, 1.0, np.inf])[0].tolist()  # numpy's histogram
    assert [counts[f"one#bin{i}"] for i in range(4)] == expected == [counts[f"two#bin{i}"] for i in range(4)]
