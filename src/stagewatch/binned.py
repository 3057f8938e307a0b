"""Values of the drift statistics from binned counts: PSI, a category mix's effect size w, a binned KS distance.

The data checks compute them from the counts a scan returns, for one window or (``*_many``) for every window of a
replay at once; the tests' simulations use them too. The sizing side of the same statistics (floors, false-alarm
odds, detectable changes) is in :mod:`stagewatch.stats`.
"""

from __future__ import annotations


import numpy as np

PSI_SMOOTHING = 0.5


def smoothed_shares(counts: np.ndarray, smoothing: float = PSI_SMOOTHING) -> np.ndarray:
    """Shares of binned counts after adding ``smoothing`` to every bin: (c_i + s) / (sum c + s B).

    The reference shares that a PSI check publishes (``stagewatch_reference_share``) are these, so that the PromQL
    PSI equals :func:`psi` on the same counts.

    >>> smoothed_shares(np.array([3, 0, 1])).round(3).tolist()
    [0.636, 0.091, 0.273]
    """
    c = np.asarray(counts, dtype=float) + smoothing
    return c / c.sum()


def psi(reference_counts: np.ndarray, window_counts: np.ndarray, smoothing: float = PSI_SMOOTHING) -> float:
    """PSI = sum((a - e) ln(a / e)) between two binned samples; ``smoothing`` is added to every bin count."""
    return float(psi_many(reference_counts, window_counts, smoothing)[0])


def effect_size_w(reference_counts: np.ndarray, window_counts: np.ndarray) -> float:
    """Cohen's w for two category mixes: sqrt(chi2 / n_eff), chi2 from the 2 x K contingency table (categories
    empty in both samples left out), as ``scipy.stats.chi2_contingency`` computes it without correction."""
    return float(effect_size_w_many(reference_counts, window_counts)[0])


def ks_from_counts(reference_counts: np.ndarray, window_counts: np.ndarray) -> float:
    """Two-sample KS distance between two samples binned on the same edges: max |F_ref - F_window| at the edges.

    The binned D never exceeds the exact D of the raw samples, and falls short of it by at most the largest
    share either sample puts in one bin (the distance between two edges can grow by no more than that inside the
    bin); with 100 reference-quantile bins that is about 0.01 plus the window's excess over 1/100.
    """
    return float(ks_many(reference_counts, window_counts)[0])


def ks_binning_error(reference_counts: np.ndarray, window_counts: np.ndarray) -> float:
    """Upper bound of exact D minus binned D: the largest share one bin holds in either sample."""
    ref = np.asarray(reference_counts, dtype=float)
    win = np.asarray(window_counts, dtype=float)
    return float(max(np.max(ref / ref.sum()), np.max(win / win.sum())))


# Many windows at once (replay evaluates every window of a month): rows are windows, columns bins or categories.


def psi_many(reference_counts: np.ndarray, window_counts: np.ndarray,
             smoothing: float = PSI_SMOOTHING) -> np.ndarray:
    """:func:`psi` of each row of ``window_counts`` against one reference (the same smoothing)."""
    e = smoothed_shares(reference_counts, smoothing)
    a = np.atleast_2d(np.asarray(window_counts, dtype=float)) + smoothing
    a = a / a.sum(axis=1, keepdims=True)
    return np.sum((a - e) * np.log(a / e), axis=1)


def effect_size_w_many(reference_counts: np.ndarray, window_counts: np.ndarray) -> np.ndarray:
    """:func:`effect_size_w` of each row (categories empty in both samples of a row contribute nothing)."""
    ref = np.asarray(reference_counts, dtype=float)
    win = np.atleast_2d(np.asarray(window_counts, dtype=float))
    m, n = ref.sum(), win.sum(axis=1, keepdims=True)
    column = ref + win
    total = m + n
    with np.errstate(divide="ignore", invalid="ignore"):
        e_ref = m * column / total
        e_win = n * column / total
        terms = np.where(column > 0, (ref - e_ref) ** 2 / e_ref + (win - e_win) ** 2 / e_win, 0.0)
        chi2 = terms.sum(axis=1)
        n_eff = (n[:, 0] * m) / (n[:, 0] + m)
        return np.sqrt(chi2 / n_eff)


def ks_many(reference_counts: np.ndarray, window_counts: np.ndarray) -> np.ndarray:
    """:func:`ks_from_counts` of each row (NaN where a row is empty)."""
    ref = np.asarray(reference_counts, dtype=float)
    win = np.atleast_2d(np.asarray(window_counts, dtype=float))
    with np.errstate(divide="ignore", invalid="ignore"):
        cw = np.cumsum(win, axis=1) / win.sum(axis=1, keepdims=True)
        return np.max(np.abs(np.cumsum(ref) / ref.sum() - cw), axis=1)
