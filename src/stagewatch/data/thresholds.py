"""Thresholds from data: each check's no-change behaviour measured on the reference period itself.

Replaying the reference against its own baseline gives, for every evaluation window, the statistic and its
sample size. Each statistic is put on its independent-item scale (n_eff PSI and n_eff w^2 against chi-square,
sqrt(n_eff) D against the Kolmogorov law, a share, mean or count change in standard errors against the normal
law); the ratio of the observed spread to the independent-item spread is the check's **dispersion** c (1 when
items are independent; the long-run variance ratio (1 + phi) / (1 - phi) for AR(1) items), reported by moments.
For the threshold, whole days of windows are resampled with replacement (a block bootstrap: cycles and
autocorrelation within a day are kept, never items resampled one by one), each resample's c taken as the largest
of the moment estimate and those that match its 95th and 99th percentiles (so a tail heavier than the law's, as
with small counts, raises it), and the upper 90% of the resampled c is used. The threshold is
then the value whose false-alarm probability, averaged over the reference's own windows (busy hours and quiet
nights alike, each with its own n), equals the alpha the plan gave the check.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import optimize
from scipy import stats as st

from stagewatch.data.check import min_samples

BOOTSTRAP = 200
UPPER = 0.9
KOLMOGOROV_MEAN = math.sqrt(math.pi / 2) * math.log(2)  # E[sup |Brownian bridge|]
SEED = 20261202


def _scale(metric: dict[str, Any], ref: dict[str, Any], n: np.ndarray, m: float | None) -> tuple[str, np.ndarray, int]:
    """(law, per-window factor s such that value / s (or value * s) is on the independent-item scale, df)."""
    s = metric["statistic"]
    n = np.asarray(n, dtype=float)
    inv_m = 0.0 if not m else 1.0 / m
    n_eff = 1.0 / (1.0 / np.maximum(n, 1e-12) + inv_m)
    occupied = sum(1 for c in ref.get("counts", []) if c > 0)  # an empty "other" bucket adds no freedom
    if s == "psi":
        return "chi2", n_eff, max(occupied - 1, 1)
    if s == "chi_square":
        return "chi2w", n_eff, max(occupied - 1, 1)
    if s == "ks":
        return "ks", np.sqrt(n_eff), 0
    if s in ("proportion", "quantile"):
        p = min(max(ref["share"], 1e-6), 1 - 1e-6)
        return "normal", np.sqrt(p * (1 - p) / n_eff), 0
    if s == "mean":
        return "normal", np.sqrt(1.0 / n_eff), 0
    if s == "count":
        return "normal", 1.0 / np.sqrt(np.maximum(n, 1e-12)), 0
    raise ValueError(s)


def normalized(law: str, values: np.ndarray, scale: np.ndarray) -> np.ndarray:
    if law == "chi2":
        return values * scale
    if law == "chi2w":
        return values**2 * scale
    if law == "ks":
        return values * scale
    return values / scale


def dispersion(law: str, z: np.ndarray, df: int, tail: bool = False) -> float:
    """Observed spread over the independent-item spread by moments; with ``tail``, the largest of that and the
    estimates that match the 95th and (with 200 windows or more) the 99th percentile, so that a tail heavier than
    the law's (small counts, bursts) raises the threshold too."""
    if z.size == 0:
        return float("nan")
    levels = ([0.95] + ([0.99] if z.size >= 200 else [])) if tail else []
    if law in ("chi2", "chi2w"):
        estimates = [float(np.mean(z) / df)]
        estimates += [float(np.quantile(z, q) / st.chi2.ppf(q, df)) for q in levels]
    elif law == "ks":
        estimates = [float((np.mean(z) / KOLMOGOROV_MEAN) ** 2)]
        estimates += [float((np.quantile(z, q) / st.kstwobign.ppf(q)) ** 2) for q in levels]
    else:
        estimates = [float(np.mean(z**2))]
        estimates += [float((np.quantile(np.abs(z), q) / st.norm.ppf((1 + q) / 2)) ** 2) for q in levels]
    return max(estimates)


def exceed(law: str, threshold: float, scale: np.ndarray, c: float, df: int, direction: str) -> np.ndarray:
    """Probability per window that the statistic reaches ``threshold`` under no change, with dispersion c."""
    if law == "chi2":
        return st.chi2.sf(threshold * scale / c, df)
    if law == "chi2w":
        return st.chi2.sf(threshold**2 * scale / c, df)
    if law == "ks":
        return st.kstwobign.sf(threshold * scale / math.sqrt(c))
    tail = st.norm.sf(threshold / (scale * math.sqrt(c)))
    return 2 * tail if direction == "both" else tail


def fit(metric: dict[str, Any], ref: dict[str, Any], values: np.ndarray, n: np.ndarray, m: float | None,
        times: np.ndarray, start: float, alphas: dict[str, float | None]) -> dict[str, Any] | None:
    """Data-based warn and critical thresholds for one check from its windows over the reference period."""
    if metric["statistic"] in ("level", "burn_rate"):
        return None
    usable = np.isfinite(values) & (n >= min_samples(metric))
    if usable.sum() < 20:
        return None
    law, scale, df = _scale(metric, ref, n[usable], m)
    z = normalized(law, values[usable], scale)
    day = ((times[usable] - start - 1e-6) // 86400).astype(int)  # a window ending at midnight: the day before
    days = np.unique(day)
    rng = np.random.default_rng(SEED)
    groups = [z[day == d] for d in days]
    resampled = [dispersion(law, np.concatenate([groups[i] for i in rng.integers(0, len(groups), len(groups))]), df,
                            tail=True) for _ in range(BOOTSTRAP)]
    c_point = dispersion(law, z, df)
    c = max(float(np.quantile(resampled, UPPER)), 1e-9)
    direction = metric.get("direction", "above")
    out: dict[str, Any] = {"dispersion": round(c_point, 4), "dispersion_upper": round(c, 4), "blocks": int(len(days)),
                           "windows": int(usable.sum())}
    for level, alpha in alphas.items():
        if not alpha:
            continue

        def gap(t: float) -> float:
            return float(np.mean(exceed(law, t, scale, c, df, direction))) - alpha

        high = 1.0
        while gap(high) > 0 and high < 1e9:
            high *= 2
        out[level] = float(optimize.brentq(gap, 1e-12, high)) if gap(1e-12) > 0 else 0.0
    return out
