"""The false-alarm budget, checked by simulating the evaluation the Prometheus export configures.

The export puts every sized check in a rule group whose ``interval`` is the check's window, so Prometheus judges
back-to-back (tumbling) windows, each once. The simulation below does exactly that: traffic arrives as a Poisson
number of items per window, the reference is a gauge calibrated once from its own sample (redrawn every
``WINDOWS_PER_REFERENCE`` windows to average over calibrations), and the value of each window is computed the way
the exported rule computes it (``exporters/signals.py``): a share minus the reference share, a rate over the
reference rate minus 1, PSI with +0.5 smoothing on both sides, w against the reference shares. KS distances and
mean shifts are the gauges the data checks publish, computed from raw values.

Each statistic is sized by ``sizing.size_metric`` with its critical threshold at the noise floor, so the plan's
``expected_false_alarms_per_week`` is the budget share; the measured count per week must match it within
``TOLERANCE`` beyond the 99.9% Poisson interval of the simulation.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as st

from stagewatch import durations, sizing
from stagewatch import binned

WINDOWS = 24_000  # about 143 weeks of 1h windows
WINDOWS_PER_REFERENCE = 40
TOLERANCE = 0.15  # the stated figure may differ from the measured one by this share, beyond sampling noise
BUDGET = sizing.Budget(pages_per_week=2, tickets_per_week=2, page_checks=1, ticket_alerts=1)

CASES = {
    # statistic: (params, direction, items per hour, reference)
    "proportion": ({"baseline": 0.05}, "both", 600, "28d"),
    "quantile": ({"q": 0.9}, "above", 600, "28d"),
    "count": ({}, "both", 600, "7d"),
    "psi": ({"bins": 10}, "above", 2000, "4h"),
    "chi_square": ({"categories": 5}, "above", 600, "28d"),
    "ks": ({}, "above", 200, "4h"),
    "mean": ({}, "both", 200, "4h"),
}


def sized(statistic: str, window: str = "1h") -> tuple[dict, dict]:
    """The metric and its sizing block, critical threshold at the noise floor (a second pass sets it)."""
    params, direction, per_hour, reference = CASES[statistic]
    metric = {"id": f"s.input.{statistic}", "statistic": statistic, "params": params, "window": window,
              "reference": reference, "warn": None, "critical": None, "direction": direction, "severity": "page"}
    traffic = sizing.Traffic(per_hour, "hours")
    floor = sizing.size_metric(metric, traffic, BUDGET)["sizing"]["noise_floor"]
    metric["critical"] = floor
    return metric, sizing.size_metric(metric, traffic, BUDGET)["sizing"]


def window_values(statistic: str, metric: dict, n: float, m: float | None, windows: int,
                  rng: np.random.Generator) -> np.ndarray:
    """The exported rule's value for ``windows`` tumbling windows with no real change."""
    params = metric["params"]
    refs = windows // WINDOWS_PER_REFERENCE
    per_ref = WINDOWS_PER_REFERENCE
    items = rng.poisson(n, (refs, per_ref))
    if statistic in ("proportion", "quantile"):
        if statistic == "proportion":
            p = params["baseline"]
            # Calibration publishes the reference sample's share as the gauge.
            ref_share = rng.binomial(int(m), p, refs) / int(m)
            true_share = np.full(refs, p)
        else:
            # The window share beyond the reference q-quantile, estimated as an order statistic of m values: the
            # mass beyond the k-th of m uniforms is Beta(m - k + 1, k) (order statistics of the uniform law).
            k = math.ceil(params["q"] * int(m))
            true_share = rng.beta(int(m) - k + 1, k, refs)
            ref_share = np.full(refs, 1 - params["q"])
        hits = rng.binomial(items, true_share[:, None])
        values = hits / np.maximum(items, 1) - ref_share[:, None]
        values[items == 0] = 0.0
        return values.ravel()
    if statistic == "count":
        # Reference rate gauge: the reference's count over its duration; the rule: rate / reference rate - 1.
        ref_count = rng.poisson(m, refs)
        return (items * (m / n) / ref_count[:, None] - 1).ravel()
    if statistic in ("psi", "chi_square"):
        k = params.get("bins") or params.get("categories")
        p0 = np.full(k, 1 / k)
        out = []
        for r in range(refs):
            ref_counts = rng.multinomial(int(m), p0)
            counts = rng.multinomial(items[r], p0)
            if statistic == "psi":
                e = binned.smoothed_shares(ref_counts)
                a = (counts + 0.5) / (counts + 0.5).sum(axis=1, keepdims=True)
                out.append(np.sum((a - e) * np.log(a / e), axis=1))
            else:
                e = np.maximum(ref_counts / ref_counts.sum(), 1e-4)
                a = counts / counts.sum(axis=1, keepdims=True)
                out.append(np.sqrt(np.sum((a - e) ** 2 / e, axis=1)))
        return np.concatenate(out)
    out = []
    for r in range(refs):
        reference = np.sort(rng.normal(0, 1, int(m)))
        for size in items[r]:
            x = rng.normal(0, 1, size)
            if statistic == "mean":
                out.append((x.mean() - reference.mean()) / reference.std(ddof=1))
            else:
                out.append(_ks(np.sort(x), reference))
    return np.array(out)


def _ks(x: np.ndarray, y: np.ndarray) -> float:
    """Two-sample KS distance of sorted samples (scipy.stats.ks_2samp's statistic, without its p-value cost)."""
    both = np.concatenate([x, y])
    return float(np.max(np.abs(np.searchsorted(x, both, side="right") / len(x)
                               - np.searchsorted(y, both, side="right") / len(y))))


def fired(values: np.ndarray, threshold: float, direction: str) -> np.ndarray:
    if direction == "above":
        return values > threshold
    if direction == "below":
        return values < -threshold
    return np.abs(values) > threshold


def poisson_interval(events: int, confidence: float = 0.999) -> tuple[float, float]:
    """Exact (Garwood) interval for a Poisson count, from chi-square quantiles."""
    a = 1 - confidence
    low = st.chi2.ppf(a / 2, 2 * events) / 2 if events else 0.0
    high = st.chi2.ppf(1 - a / 2, 2 * events + 2) / 2
    return low, high


def measured_per_week(statistic: str, metric: dict, block: dict, seed: int) -> tuple[float, float, float]:
    rng = np.random.default_rng(seed)
    windows = WINDOWS if statistic not in ("ks", "mean") else WINDOWS // 4
    values = window_values(statistic, metric, block["samples_per_window"], block.get("reference_samples"),
                           windows, rng)
    events = int(fired(values, metric["critical"], metric["direction"]).sum())
    weeks = len(values) / block["evaluations_per_week"]
    low, high = poisson_interval(events)
    return events / weeks, low / weeks, high / weeks


def test_ks_helper_is_scipys_statistic():
    rng = np.random.default_rng(3)
    x, y = np.sort(rng.normal(0, 1, 70)), np.sort(rng.normal(0.2, 1, 300))
    assert _ks(x, y) == pytest.approx(st.ks_2samp(x, y).statistic)


@pytest.mark.parametrize("statistic", sorted(CASES))
def test_false_alarms_per_week_under_the_exported_evaluation(statistic):
    metric, block = sized(statistic)
    assert block["evaluations_per_week"] == durations.WEEK / durations.parse(metric["window"])
    stated = block["expected_false_alarms_per_week"]
    rate, low, high = measured_per_week(statistic, metric, block, seed=sorted(CASES).index(statistic))
    assert low <= stated * (1 + TOLERANCE) and high >= stated / (1 + TOLERANCE), (
        f"{statistic}: measured {rate:.3g} per week ({low:.3g}-{high:.3g}), plan states {stated:.3g}")


def test_the_demo_plans_stated_false_pages_per_week_hold_under_the_exported_evaluation():
    """The demo plan's summary line, simulated: every page check whose stated figure is above "< 1e-6" is run on
    back-to-back windows with no change, long enough to expect about five false pages in all, and the total is
    compared with the sum the plan states (the "< 1e-6" checks add at most 1e-6 each)."""
    from stagewatch.demo import DEMO
    from stagewatch.plan import all_metrics, compose
    from stagewatch.spec import load_pipeline

    plan = compose(load_pipeline(str(DEMO)))
    pages = [m for m in all_metrics(plan) if m.get("severity") == "page" and m["statistic"] in CASES
             and isinstance((m.get("sizing") or {}).get("expected_false_alarms_per_week"), (int, float))
             and m["sizing"]["expected_false_alarms_per_week"] > 0]
    stated = sum(m["sizing"]["expected_false_alarms_per_week"] for m in pages)
    assert pages and stated == pytest.approx(plan["budget"]["expected_false_pages_per_week"], rel=0.02, abs=1e-5)
    weeks = 5 / stated
    rng = np.random.default_rng(11)
    events = 0
    for m in pages:
        block = m["sizing"]
        windows = int(weeks * block["evaluations_per_week"]) // WINDOWS_PER_REFERENCE * WINDOWS_PER_REFERENCE
        values = window_values(m["statistic"], {"params": m.get("params") or {}}, block["samples_per_window"],
                               block.get("reference_samples"), windows, rng)
        events += int(fired(values, m["critical"], m["direction"]).sum())
    low, high = poisson_interval(events)
    assert low / weeks <= stated * (1 + TOLERANCE) and high / weeks >= stated / (1 + TOLERANCE), (
        f"measured {events / weeks:.3g} false pages a week ({low / weeks:.3g}-{high / weeks:.3g}), "
        f"the plan states {stated:.3g}")
