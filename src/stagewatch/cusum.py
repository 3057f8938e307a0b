"""A Bernoulli CUSUM for slow shares (label-based quality): increments, run lengths, limits and the path over
grouped counts."""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize

def bernoulli_cusum_increments(p0: float, p1: float) -> tuple[float, float]:
    """Log-likelihood-ratio increments of a Bernoulli CUSUM for p0 -> p1 (Reynolds & Stoumbos 1999): an item that
    matches adds ln(p1/p0) > 0, one that does not adds ln((1-p1)/(1-p0)) < 0."""
    return math.log(p1 / p0), math.log((1 - p1) / (1 - p0))


def bernoulli_cusum_arl(p: float, p0: float, p1: float, h: float, resolution: int = 20) -> float:
    """Average run length in items of the Bernoulli CUSUM S = max(0, S + increment), alarm at S >= h, when items
    match with probability ``p``: a Markov chain on S discretised in steps of |ln((1-p1)/(1-p0))| / resolution
    (Brook & Evans 1972, Biometrika 59:539-549), solved exactly. ``p = p0`` gives the in-control run length.
    """
    from scipy.sparse import lil_matrix
    from scipy.sparse.linalg import spsolve

    a, b = bernoulli_cusum_increments(p0, p1)
    step = -b / resolution
    up = max(1, int(round(a / step)))
    states = max(1, int(math.ceil(h / step)))
    q = lil_matrix((states, states))
    for i in range(states):
        if i + up < states:
            q[i, i + up] += p
        q[i, max(i - resolution, 0)] += 1 - p
    identity = lil_matrix((states, states))
    identity.setdiag(1.0)
    lengths = spsolve((identity - q).tocsc(), np.ones(states))
    return float(np.atleast_1d(lengths)[0])


def bernoulli_cusum_limit(p0: float, p1: float, arl0: float) -> float:
    """The limit h whose in-control run length (items) is ``arl0``."""
    def gap(h: float) -> float:
        return math.log(bernoulli_cusum_arl(p0, p0, p1, h)) - math.log(arl0)

    high = 1.0
    while gap(high) < 0 and high < 200:
        high *= 2
    return float(optimize.brentq(gap, 1e-6, high, xtol=1e-4))


def binomial_cusum(matches: np.ndarray, n: np.ndarray, p0: float, p1: float, h: float | None = None
                   ) -> tuple[np.ndarray, np.ndarray]:
    """The CUSUM after each group of items (``matches`` of ``n``), floored at 0 at group ends only, which never
    makes it higher than the item-by-item CUSUM. With ``h``, it restarts at 0 after each alarm. Returns (S, alarm).
    """
    a, b = bernoulli_cusum_increments(p0, p1)
    increments = np.asarray(matches, float) * a + (np.asarray(n, float) - np.asarray(matches, float)) * b
    path = np.empty(increments.size)
    alarm = np.zeros(increments.size, dtype=bool)
    s = 0.0
    for i, x in enumerate(increments):
        s = max(0.0, s + x)
        path[i] = s
        if h is not None and s >= h:
            alarm[i] = True
            s = 0.0
    return path, alarm
