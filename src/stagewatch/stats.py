"""The statistics that sizing and data checks share: noise floors, false-alarm odds, detectable changes.

Each drift statistic is registered in :data:`STATISTICS` under the name the catalog and plan use. A statistic knows,
for a check window of ``n`` samples against a reference of ``m`` samples (``m=None`` for a reference known
exactly):

* ``floor(n, m, alpha)``: the threshold that a window with no real shift exceeds with probability ``alpha``;
* ``false_alarm(threshold, n, m)``: the probability that a window with no shift exceeds ``threshold``;
* ``detectable(n, m, alpha, power)``: the smallest true change that exceeds the ``alpha`` floor with probability
  ``power``.

Nothing here knows about YAML, plans or pipelines.
"""

from __future__ import annotations

import math
from functools import lru_cache
from dataclasses import dataclass
from typing import TYPE_CHECKING, Protocol

from stagewatch.lazy import LazyModule

if TYPE_CHECKING:
    import numpy as np
    from scipy import optimize
    from scipy import stats as st
else:  # imported on first use: commands that only read a plan never load scipy
    np = LazyModule("numpy")
    optimize = LazyModule("scipy.optimize")
    st = LazyModule("scipy.stats")

from stagewatch import tails

DEFAULT_POWER = 0.8


def effective_n(n: float, m: float | None) -> float:
    """n m / (n + m): the sample size that matters when two samples are compared; ``n`` if ``m`` is None."""
    if m is None or math.isinf(m):
        return float(n)
    return n * m / (n + m)


@lru_cache(maxsize=4096)
def _z(alpha: float, sides: int) -> float:
    return float(st.norm.isf(alpha / sides))


@lru_cache(maxsize=4096)
def _chi2_isf(alpha: float, df: int) -> float:
    return float(st.chi2.isf(alpha, df))


def ks_coefficient(alpha: float) -> float:
    """c(alpha) = sqrt(-ln(alpha / 2) / 2) of the large-sample two-sample KS test (Smirnov 1948).

    >>> round(ks_coefficient(0.05), 3)
    1.358
    """
    return math.sqrt(-math.log(alpha / 2) / 2)


def two_proportion_sample_size(p1: float, p2: float, alpha: float = 0.05, power: float = 0.9,
                               continuity: bool = True) -> float:
    """Samples per group to tell p1 from p2 with a two-sided test (Fleiss, Tytun & Ury 1980).

    n' = [z(1-a/2) sqrt(2 pbar qbar) + z(1-b) sqrt(p1 q1 + p2 q2)]^2 / (p1 - p2)^2, and with the continuity
    correction n = (n'/4) [1 + sqrt(1 + 4 / (n' |p1 - p2|))]^2.

    >>> round(two_proportion_sample_size(0.45, 0.25, 0.05, 0.90, continuity=False), 1)
    117.4
    """
    pbar = (p1 + p2) / 2
    za = _z(alpha, 2)
    zb = float(st.norm.ppf(power))
    delta = abs(p1 - p2)
    n = (za * math.sqrt(2 * pbar * (1 - pbar)) + zb * math.sqrt(p1 * (1 - p1) + p2 * (1 - p2))) ** 2 / delta**2
    if continuity:
        n = n / 4 * (1 + math.sqrt(1 + 4 / (n * delta))) ** 2
    return n


class Statistic(Protocol):
    name: str
    unit: str

    def floor(self, n: float, m: float | None, alpha: float) -> float: ...

    def false_alarm(self, threshold: float, n: float, m: float | None) -> float: ...

    def detectable(self, n: float, m: float | None, alpha: float, power: float = DEFAULT_POWER) -> float: ...

    def detectable_at(self, threshold: float, n: float, m: float | None, power: float = DEFAULT_POWER) -> float: ...

    def min_samples(self) -> int: ...

    def describe(self) -> str: ...


@dataclass
class PSI:
    """Population stability index over ``bins`` bins.

    Under no shift, (n m / (n + m)) PSI is approximately chi-square with bins - 1 degrees of freedom
    (Yurdakul 2018). Under a shift the statistic is approximately non-central chi-square with non-centrality
    n_eff * PSI_true, which gives the detectable PSI at a given power.
    """

    bins: int = 10
    name: str = "psi"
    unit: str = "PSI"

    def floor(self, n, m, alpha):
        return _chi2_isf(alpha, self.bins - 1) / effective_n(n, m)

    def false_alarm(self, threshold, n, m):
        return float(st.chi2.sf(threshold * effective_n(n, m), self.bins - 1))

    def detectable(self, n, m, alpha, power=DEFAULT_POWER):
        return _noncentral_chi2_effect(self.bins - 1, alpha, power) / effective_n(n, m)

    def detectable_at(self, threshold, n, m, power=DEFAULT_POWER):
        n_eff = effective_n(n, m)
        return _noncentrality_for(self.bins - 1, threshold * n_eff, power) / n_eff

    def min_samples(self):
        # The chi-square law of PSI is poor in the far tail at small counts: with 12 items per bin the
        # false-alarm rate at alpha = 1e-3 is about 3 alpha, with 50 per bin 1.4 alpha, from 100 per bin it holds
        # down to alpha = 1e-4 (our own simulation, repeated in tests/test_sizing.py). So: 100 per bin.
        return 100 * self.bins

    def describe(self):
        return (f"n_eff x PSI follows a chi-square law with {self.bins - 1} degrees of freedom when nothing "
                f"changed ({self.bins} bins)")


@dataclass
class CategoryMix:
    """Chi-square test of a category mix, thresholds in Cohen's effect size w = sqrt(chi2 / n_eff)."""

    categories: int = 10
    name: str = "chi_square"
    unit: str = "effect size w"

    def floor(self, n, m, alpha):
        return math.sqrt(_chi2_isf(alpha, self.categories - 1) / effective_n(n, m))

    def false_alarm(self, threshold, n, m):
        return float(st.chi2.sf(threshold**2 * effective_n(n, m), self.categories - 1))

    def detectable(self, n, m, alpha, power=DEFAULT_POWER):
        return math.sqrt(_noncentral_chi2_effect(self.categories - 1, alpha, power) / effective_n(n, m))

    def detectable_at(self, threshold, n, m, power=DEFAULT_POWER):
        n_eff = effective_n(n, m)
        return math.sqrt(_noncentrality_for(self.categories - 1, threshold**2 * n_eff, power) / n_eff)

    def min_samples(self):
        return 5 * self.categories  # common practice: at least 5 expected per category

    def describe(self):
        return (f"n_eff x w^2 follows a chi-square law with {self.categories - 1} degrees of freedom when the mix "
                f"did not change ({self.categories} categories)")


@dataclass
class KS:
    """Two-sample Kolmogorov-Smirnov distance D, large-sample (Kolmogorov distribution) form."""

    name: str = "ks"
    unit: str = "KS distance D"

    def floor(self, n, m, alpha):
        return ks_coefficient(alpha) / math.sqrt(effective_n(n, m))

    def false_alarm(self, threshold, n, m):
        # The first term of the Kolmogorov series, the same approximation as c(alpha); it bounds the exact
        # tail (scipy.stats.kstwobign.sf) from above.
        c = threshold * math.sqrt(effective_n(n, m))
        return min(1.0, 2 * math.exp(-2 * c * c))

    def detectable(self, n, m, alpha, power=DEFAULT_POWER):
        # D_observed >= D_true - (sampling deviation); the deviation stays below kstwobign.ppf(power) / sqrt(n_eff)
        # with probability `power`, so this is a conservative bound.
        return self.detectable_at(self.floor(n, m, alpha), n, m, power)

    def detectable_at(self, threshold, n, m, power=DEFAULT_POWER):
        # Stated shift shape: a small location shift of a normal law. sqrt(n_eff) (F_n - G_m) tends to a Brownian
        # bridge B(u) plus sqrt(n_eff) times the true difference, whose shape over u = F(x) is phi(Phi^-1(u)) scaled
        # to peak at the true distance D; solve P(sup |B + sqrt(n_eff) D h| > threshold sqrt(n_eff)) = power by
        # simulating the bridge (no closed form: the supremum sits where the difference is flattest).
        n_eff = effective_n(n, m)
        return _ks_shift(round(threshold * math.sqrt(n_eff), 4), power) / math.sqrt(n_eff)

    def min_samples(self):
        return 30  # common practice: the large-sample form is used from a few dozen samples on

    def describe(self):
        return "D > c(alpha) sqrt((n+m)/(n m)) with c(alpha) = sqrt(-ln(alpha/2)/2) (Smirnov 1948)"


@dataclass
class Proportion:
    """Change of a share (missing, unknown, pass-through, error rate) from a reference share ``baseline``.

    Thresholds are absolute changes of the share: the window share minus the reference share, the latter
    estimated from ``m`` items (or known exactly, ``m=None``). False alarms and power come from the exact binomial
    laws (:func:`stagewatch.tails.share_tail`), not the normal approximation, which fires 1.4x alpha at a share of
    0.01 and 2.6x at 0.001 in the far tail. ``direction`` is ``above``, ``below`` or ``both`` (default: ``both``
    for ``sides=2``, else ``above``).
    """

    baseline: float = 0.01
    sides: int = 2
    direction: str = ""
    name: str = "proportion"
    unit: str = "change in share"

    def _direction(self) -> str:
        return self.direction or ("both" if self.sides == 2 else "above")

    def _se0(self, n, m):
        p = self.baseline
        inv_m = 0.0 if m is None else 1.0 / m
        return math.sqrt(p * (1 - p) * (1.0 / n + inv_m))

    def _tail(self, threshold: float, n: float, m: float | None, shift: float = 0.0) -> float:
        return tails.share_tail(float(threshold), tails.whole(n), None if m is None else tails.whole(m),
                                self.baseline, self._direction(), shift)

    def floor(self, n, m, alpha):
        start = max(2 * _z(alpha, 2) * self._se0(n, m), 2.0 / tails.whole(n))
        return tails.smallest_threshold(lambda t: self._tail(t, n, m), alpha, start)

    def false_alarm(self, threshold, n, m):
        return self._tail(threshold, n, m)

    def detectable(self, n, m, alpha, power=DEFAULT_POWER):
        return self.detectable_at(self.floor(n, m, alpha), n, m, power)

    def _room(self) -> list[float]:
        """The largest shift each watched direction allows (+ rise, - drop)."""
        d = self._direction()
        out = []
        if d in ("above", "both"):
            out.append(1 - self.baseline)
        if d in ("below", "both"):
            out.append(-self.baseline)
        return out

    def _fires(self, threshold, n, m, shift):
        return self._tail(threshold, n, m, shift)

    def detectable_at(self, threshold, n, m, power=DEFAULT_POWER):
        """Smallest true change (in the worse watched direction) that makes the alert fire with ``power``.

        A direction with no room for a change that large (a drop of 0.1 from a share of 0.05) is left out; if no
        direction has room, the change cannot be detected (inf)."""
        worst = -math.inf
        for room in self._room():
            sign = 1.0 if room > 0 else -1.0
            found = tails.smallest_shift(lambda s: self._fires(threshold, n, m, sign * s), power,
                                         max(threshold, 1e-6) * 2, abs(room))
            if not math.isinf(found):
                worst = max(worst, found)
        return math.inf if math.isinf(worst) else worst

    def min_samples(self):
        # The exact test holds its size at any n. Below one expected match per window a share of 0 is the usual
        # window, and a drop cannot show: our rule, at least one expected match (or non-match).
        return math.ceil(1 / min(self.baseline, 1 - self.baseline) - 1e-9)

    def describe(self):
        d = self._direction()
        side = {"both": "two-sided", "above": "one-sided (rise)", "below": "one-sided (drop)"}[d]
        return (f"exact binomial law of the window share minus the reference share, {side}, at a reference share "
                f"of {self.baseline:g}")


@dataclass
class Quantile(Proportion):
    """Shift of a quantile, read as the share of window values beyond the reference ``q``-quantile.

    With no shift that share is 1 - q. The reference quantile is the k-th of ``m`` reference values
    (k = ceil(q m)), so the mass beyond it is Beta(m - k + 1, k) and the window count beta-binomial: the exact law
    at any sample size, small references included (:func:`stagewatch.tails.quantile_share_tail`).
    """

    q: float = 0.95
    tail: str = "above"  # which tail the log counts: "above" the q-quantile, or "below" the (1 - q)-quantile
    name: str = "quantile"
    unit: str = "change in share beyond the reference quantile"

    def __post_init__(self):
        self.baseline = 1 - self.q
        if not self.direction:
            self.sides = 1

    def _tail(self, threshold, n, m, shift=0.0):
        return tails.quantile_share_tail(float(threshold), tails.whole(n), None if m is None else tails.whole(m),
                                         self.q, self._direction(), shift)

    def describe(self):
        level, side = (1 - self.q, "below") if self.tail == "below" else (self.q, "above")
        return (f"share of values {side} the reference {level:g}-quantile against {1 - self.q:g}, exact "
                f"beta-binomial law (the quantile estimated from the reference sample)")


@dataclass
class MeanShift:
    """Shift of a mean in units of the reference standard deviation (z-test)."""

    sides: int = 2
    name: str = "mean"
    unit: str = "reference standard deviations"

    def _se(self, n, m):
        return math.sqrt(1.0 / n + (0.0 if m is None else 1.0 / m))

    def floor(self, n, m, alpha):
        return _z(alpha, self.sides) * self._se(n, m)

    def false_alarm(self, threshold, n, m):
        return min(1.0, self.sides * float(st.norm.sf(threshold / self._se(n, m))))

    def detectable(self, n, m, alpha, power=DEFAULT_POWER):
        return self.detectable_at(self.floor(n, m, alpha), n, m, power)

    def detectable_at(self, threshold, n, m, power=DEFAULT_POWER):
        return threshold + float(st.norm.ppf(power)) * self._se(n, m)

    def min_samples(self):
        return 30  # common practice for a z-test on a mean

    def describe(self):
        return "z-test on the window mean, in reference standard deviations"


@dataclass
class CountChange:
    """Relative change of a count against the reference rate, e.g. rows or requests per window.

    ``n`` is the expected count in the window and ``m`` the count over the reference period (``None``: the
    reference rate is known exactly). The law is exact: given the total of both counts, the window's count is
    binomial (the conditional test of two Poisson rates, :func:`stagewatch.tails.count_tail`), so a short
    reference widens the floor as it should.
    """

    sides: int = 2
    direction: str = ""
    name: str = "count"
    unit: str = "relative change of the count"

    def _direction(self) -> str:
        return self.direction or ("both" if self.sides == 2 else "above")

    def _tail(self, threshold, n, m, shift=0.0):
        return tails.count_tail(float(threshold), float(n), None if m is None else float(m), self._direction(),
                                shift)

    def floor(self, n, m, alpha):
        inv_m = 0.0 if m is None else 1.0 / m
        start = 2 * _z(alpha, 2) * math.sqrt(1.0 / n + inv_m) + 1.0 / n
        return tails.smallest_threshold(lambda t: self._tail(t, n, m), alpha, start)

    def false_alarm(self, threshold, n, m):
        return self._tail(threshold, n, m)

    def detectable(self, n, m, alpha, power=DEFAULT_POWER):
        return self.detectable_at(self.floor(n, m, alpha), n, m, power)

    def detectable_at(self, threshold, n, m, power=DEFAULT_POWER):
        """Smallest relative change, in the worse watched direction, that makes the alert fire with ``power``."""
        d = self._direction()
        worst = -math.inf
        for sign, limit in ((1.0, 1e3), (-1.0, 1.0)):  # up to a thousandfold rise, down to no items at all
            if (sign > 0 and d == "below") or (sign < 0 and d == "above"):
                continue
            found = tails.smallest_shift(lambda s: self._tail(threshold, n, m, sign * s), power,
                                         max(threshold, 1e-6) * 2, limit)
            if not math.isinf(found):
                worst = max(worst, found)
        return math.inf if math.isinf(worst) else worst

    def min_samples(self):
        return 1  # the exact law holds at any count; the floor says how large a change must be

    def describe(self):
        return ("count against the reference rate, exact conditional binomial law of two Poisson counts (real "
                "traffic swings by hour and weekday more than Poisson: compare against the same hour of the "
                "reference)")


@lru_cache(maxsize=1)
def _bridge() -> tuple[np.ndarray, np.ndarray]:
    """2,000 Brownian bridges on 400 points (fixed seed) and the shape of a normal location shift over u."""
    rng = np.random.default_rng(20261202)
    points = 400
    u = (np.arange(1, points + 1) - 0.5) / points
    walk = np.cumsum(rng.normal(0, math.sqrt(1 / points), (2000, points)), axis=1)
    bridge = walk - u * walk[:, -1:]
    shape = st.norm.pdf(st.norm.ppf(u))
    return bridge, shape / shape.max()


@lru_cache(maxsize=4096)
def _ks_shift(scaled_threshold: float, power: float) -> float:
    """Scaled distance delta with P(sup |B(u) + delta h(u)| > scaled_threshold) = power (see KS.detectable_at)."""
    bridge, shape = _bridge()

    def fires(delta: float) -> float:
        return float(np.mean(np.max(np.abs(bridge + delta * shape), axis=1) > scaled_threshold))

    return tails.smallest_shift(fires, power, max(scaled_threshold, 0.1), 1e3)


@lru_cache(maxsize=4096)
def _noncentral_chi2_effect(df: int, alpha: float, power: float) -> float:
    """Non-centrality at which a chi-square(df) test at level alpha has the given power."""
    return _noncentrality_for(df, _chi2_isf(alpha, df), power)


@lru_cache(maxsize=4096)
def _noncentrality_for(df: int, critical: float, power: float) -> float:
    """Non-centrality at which a non-central chi-square(df) exceeds ``critical`` with probability ``power``."""

    def gap(lam: float) -> float:
        return float(st.ncx2.sf(critical, df, lam)) - power

    if gap(1e-9) >= 0:  # noise alone already exceeds `critical` that often
        return 0.0
    high = max(1.0, critical)
    while gap(high) < 0:
        high *= 2
    return float(optimize.brentq(gap, 1e-9, high))


def make(name: str, **params: float | str) -> Statistic:
    """The statistic registered as ``name`` with its parameters (``bins``, ``categories``, ``baseline`` ...)."""
    factory = STATISTICS[name]
    accepted = factory.__dataclass_fields__  # type: ignore[attr-defined]
    return factory(**{k: v for k, v in params.items() if k in accepted and k not in ("name", "unit")})


STATISTICS: dict[str, type] = {
    "psi": PSI,
    "chi_square": CategoryMix,
    "ks": KS,
    "proportion": Proportion,
    "quantile": Quantile,
    "mean": MeanShift,
    "count": CountChange,
}

# Statistics without sampling noise: a fixed limit on a level (freshness, run failures, NaN count), and SLO
# burn rates, which are judged against an error budget rather than a null distribution.
LEVEL = "level"
BURN_RATE = "burn_rate"
ALL_STATISTICS = (*STATISTICS, LEVEL, BURN_RATE)
