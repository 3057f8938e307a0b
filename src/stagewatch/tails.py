"""Exact tail probabilities of shares and counts, where the normal approximation fails in the far tail.

A check alerts at per-evaluation alphas of 1e-3 to 1e-6, where the normal approximation of a binomial share or a
Poisson count can be off by a factor of 2 or more. These are the exact laws of what the exported rules compare
with their thresholds:

* a share against a reference share estimated from ``m`` items: ``X/n - Y/m`` with ``X ~ Bin(n, p)`` and
  ``Y ~ Bin(m, p)``, summed over ``Y`` (Clopper & Pearson 1934 for the binomial tail);
* a share beyond a reference quantile estimated from ``m`` values: the mass beyond the k-th of ``m`` order
  statistics is ``Beta(m - k + 1, k)``, so the window count is beta-binomial;
* a count against a reference count over a longer period: given the total ``T = X + Y``, ``X ~ Bin(T, n/(n+m))``
  (the conditional test of two Poisson rates, Przyborowski & Wilenski 1940), summed over ``T``.

``n`` and ``m`` are whole numbers of items (rounded); ``m=None`` means the reference is known exactly. Every
function returns the probability that the value is beyond ``t`` in ``direction`` (``above``, ``below`` or ``both``).
Nothing here knows about plans.
"""

from __future__ import annotations

import math
from functools import lru_cache

from typing import TYPE_CHECKING

from stagewatch.lazy import LazyModule

if TYPE_CHECKING:
    import numpy as np
    from scipy import stats as st
else:  # imported on first use
    np = LazyModule("numpy")
    st = LazyModule("scipy.stats")

_EDGE = 1e-13  # probability mass left out at each end of a sum over the reference (far below any alpha we use)
_EPS = 1e-9  # guards floor() and ceil() against float error at exact lattice points


def whole(x: float) -> int:
    """A sample size as a whole number of items (at least 1)."""
    return max(1, int(round(x)))


_POINTS = 1500  # at most this many reference values are summed; beyond that an evenly spaced grid stands in


def _span(law, *shape: float) -> tuple[np.ndarray, np.ndarray]:
    """The values the discrete ``law`` (a scipy.stats distribution, with its ``shape`` parameters) takes outside
    its 1e-13 tails, with their probabilities.

    A wide law (a reference of millions of items) is summed on an evenly spaced grid of ``_POINTS`` values,
    each weighted by its probability times the spacing: the summands vary slowly over a step, so the sum keeps
    about three significant figures. (The law is called with its parameters rather than frozen: freezing a
    scipy distribution builds a new one, docstrings included, at every call.)
    """
    low, high = law.ppf(_EDGE, *shape), law.isf(_EDGE, *shape)
    if not (np.isfinite(low) and np.isfinite(high)):  # scipy gives up on very large laws: 8 standard deviations
        mean, sd = law.mean(*shape), law.std(*shape)
        low, high = mean - 8 * sd, mean + 8 * sd
    low, high = int(max(low, 0)), int(high)
    if high - low + 1 <= _POINTS:
        values = np.arange(low, high + 1)
        return values, law.pmf(values, *shape)
    values = np.unique(np.linspace(low, high, _POINTS).round())
    step = np.gradient(values)
    return values, law.pmf(values, *shape) * step


@lru_cache(maxsize=1024)
def _binomial_span(m: int, p: float) -> tuple[np.ndarray, np.ndarray]:
    return _span(st.binom, m, p)


@lru_cache(maxsize=1024)
def _poisson_span(mean: float) -> tuple[np.ndarray, np.ndarray]:
    return _span(st.poisson, mean)


def _on_distinct(f, k: np.ndarray, n: int, q: float) -> np.ndarray:
    """``f(k, n, q)`` evaluated once per distinct k: a reference much larger than the window maps hundreds of
    reference values to the same window count, so this gives the very same values at a fraction of the cost."""
    distinct, back = np.unique(k, return_inverse=True)
    return f(distinct, n, q)[back]


@lru_cache(maxsize=65536)
def share_tail(t: float, n: int, m: int | None, p: float, direction: str, shift: float = 0.0) -> float:
    """P(X/n - Y/m beyond t) with X ~ Bin(n, p + shift) and Y ~ Bin(m, p); Y/m = p when ``m`` is None."""
    q = min(max(p + shift, 0.0), 1.0)
    if m is None:
        ys, weights = np.array([p]), np.array([1.0])
    else:
        y, weights = _binomial_span(m, p)
        ys = y / m
    total = 0.0
    if direction in ("above", "both"):
        total += float(np.sum(weights * _on_distinct(st.binom.sf, np.floor(n * (t + ys) + _EPS), n, q)))
    if direction in ("below", "both"):
        total += float(np.sum(weights * _on_distinct(st.binom.cdf, np.ceil(n * (ys - t) - _EPS) - 1, n, q)))
    return min(1.0, total)


def quantile_order(q: float, m: int) -> int:
    """The order statistic taken as the reference q-quantile of m values: the k-th smallest, k = ceil(q m)
    (numpy's ``method="inverted_cdf"``)."""
    return min(m, max(1, math.ceil(q * m - _EPS)))


@lru_cache(maxsize=65536)
def quantile_share_tail(t: float, n: int, m: int | None, q: float, direction: str, shift: float = 0.0) -> float:
    """P(share of n window values beyond the reference q-quantile, minus 1 - q, is beyond t).

    With the quantile estimated from m values, the true mass beyond it is Beta(m - k + 1, k), so with no shift
    the window count is beta-binomial (``scipy.stats.betabinom``); a ``shift`` adds to that mass (a rise of the
    share beyond the quantile). The mixture over the Beta law is integrated on a grid that reaches its 1e-11
    tails. ``m=None``: the mass is exactly 1 - q.
    """
    base = 1 - q
    if m is None:
        masses, weights = np.array([base]), np.array([1.0])
    else:
        masses, weights = _beta_grid(m, quantile_order(q, m))
    masses = np.clip(masses + shift, 0.0, 1.0)
    total = 0.0
    if direction in ("above", "both"):
        total += float(np.sum(weights * st.binom.sf(math.floor(n * (t + base) + _EPS), n, masses)))
    if direction in ("below", "both"):
        total += float(np.sum(weights * st.binom.cdf(math.ceil(n * (base - t) - _EPS) - 1, n, masses)))
    return min(1.0, total)


@lru_cache(maxsize=256)
def _beta_grid(m: int, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Values of the Beta(m - k + 1, k) mass beyond the reference quantile and their weights: quantiles at
    u = 1 / (1 + exp(-z)) for z evenly spaced in [-25, 25], weighted du, so that both tails are covered."""
    z = np.linspace(-25, 25, 801)
    u = 1 / (1 + np.exp(-z))
    weights = u * (1 - u) * (z[1] - z[0])
    weights /= weights.sum()
    return st.beta(m - k + 1, k).ppf(u), weights


@lru_cache(maxsize=65536)
def count_tail(t: float, n: float, m: float | None, direction: str, shift: float = 0.0) -> float:
    """P(relative change of a count beyond t): r = (X / n) / (Y / m) - 1 with X ~ Poisson(n (1 + shift)) in the
    window and Y ~ Poisson(m) over the reference; ``m=None``: r = X / n - 1.

    Conditional on T = X + Y, X ~ Bin(T, pi) with pi = n (1 + shift) / (n (1 + shift) + m); r > t exactly when
    X > T (1 + t) n / (m + (1 + t) n), and r < -t when X < T (1 - t) n / (m + (1 - t) n).
    """
    rate = n * (1 + shift)
    if m is None:
        total = 0.0
        if direction in ("above", "both"):
            total += float(st.poisson.sf(math.floor(n * (1 + t) + _EPS), rate))
        if direction in ("below", "both") and t < 1:
            total += float(st.poisson.cdf(math.ceil(n * (1 - t) - _EPS) - 1, rate))
        return min(1.0, total)
    totals, weights = _poisson_span(rate + m)
    pi = rate / (rate + m)
    total = 0.0
    if direction in ("above", "both"):
        c = (1 + t) * n / (m + (1 + t) * n)
        total += float(np.sum(weights * st.binom.sf(np.floor(totals * c + _EPS), totals, pi)))
    if direction in ("below", "both") and t < 1:
        c = (1 - t) * n / (m + (1 - t) * n)
        total += float(np.sum(weights * st.binom.cdf(np.ceil(totals * c - _EPS) - 1, totals, pi)))
    return min(1.0, total)


def smallest_threshold(tail, alpha: float, high: float) -> float:
    """The smallest t in [0, high] with tail(t) <= alpha, by bisection (the tails are step functions of t)."""
    if tail(0.0) <= alpha:
        return 0.0
    while tail(high) > alpha:
        high *= 2
        if high > 1e6:
            return math.inf
    low = 0.0
    for _ in range(40):
        mid = (low + high) / 2
        if tail(mid) <= alpha:
            high = mid
        else:
            low = mid
        if high - low <= 1e-5 * high:
            break
    return high


def smallest_shift(fires, power: float, high: float, limit: float) -> float:
    """The smallest shift in [0, limit] with fires(shift) >= power, by bisection; inf if even ``limit`` is short.

    ``fires`` rises with the shift, so ``limit`` itself is tried only when the doubling reaches it."""
    high = min(high, limit)
    while fires(high) < power:
        if high >= limit:
            return math.inf
        high = min(limit, high * 2)
    low = 0.0
    for _ in range(40):
        mid = (low + high) / 2
        if fires(mid) >= power:
            high = mid
        else:
            low = mid
        if high - low <= 1e-4 * high:
            break
    return high
