"""The documented law of each strategy's goal step (docs/relabel.md), for the statistical audit.

Every law is a discrete distribution on a range of integers given the transition (t, T). For
each row the audit computes the randomised probability-integral transform (PIT)

    U = F(x - 1) + V * P(X = x),    V ~ Uniform[0, 1) independent of the set,

which is exactly Uniform[0, 1) when ``x`` follows the law (the standard randomised PIT for
discrete variables; the jitter ``V`` comes from a numpy generator seeded with the set's own
seed, so the audit is repeatable). It also gives the probabilities of the two end points of
the range, and the probability that two independent draws coincide.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class LawRows:
    """One law evaluated at M rows.

    Attributes
    ----------
    pit : ndarray (M,)
        Randomised PIT values (NaN where ``x`` lies outside the law's range).
    at_low, at_high : ndarray of bool (M,)
        ``x`` is the smallest / largest value of the range.
    p_low, p_high : ndarray (M,)
        Their probabilities under the law.
    p_same : ndarray (M,)
        Probability that two independent draws are equal (sum of squared probabilities).
    """

    pit: np.ndarray
    at_low: np.ndarray
    at_high: np.ndarray
    p_low: np.ndarray
    p_high: np.ndarray
    p_same: np.ndarray


def uniform_law(x, low, high, v) -> LawRows:
    """``x`` uniform on the integers ``{low, ..., high}`` (high >= low)."""
    x, low, high = (np.asarray(z, dtype=np.int64) for z in (x, low, high))
    n = np.maximum(high - low + 1, 1).astype(np.float64)   # rows outside the law's domain get NaN
    inside = (x >= low) & (x <= high)
    pit = np.where(inside, (x - low + np.asarray(v)) / n, np.nan)
    return LawRows(pit, x == low, x == high, 1.0 / n, 1.0 / n, 1.0 / n)


def geometric_law(k, room, gamma: float, past_end: str, v) -> LawRows:
    """Offset ``k = j - t`` of the geometric strategy, ``room = T - t`` (>= 1).

    ``P(K = k) = (1 - gamma) gamma^(k-1)`` on {1, 2, ...}. ``clip``: every k >= room becomes
    room, so ``P(K = room) = gamma^(room-1)``. ``truncate``: the law conditioned on
    ``K <= room``, probabilities divided by ``1 - gamma^room``.
    """
    k = np.asarray(k, dtype=np.int64)
    room = np.asarray(room, dtype=np.int64)
    g = float(gamma)
    inside = (k >= 1) & (k <= room)
    kk = np.clip(k, 1, np.maximum(room, 1)).astype(np.float64)
    r = np.maximum(room, 1).astype(np.float64)
    if past_end == "clip":
        below = 1.0 - g ** (kk - 1.0)                      # F(k - 1)
        pmf = np.where(kk < r, (1.0 - g) * g ** (kk - 1.0), g ** (r - 1.0))
        p_low = np.where(r > 1, 1.0 - g, 1.0)
        p_high = g ** (r - 1.0)
        tail = g ** (2.0 * (r - 1.0))
        p_same = (1.0 - g) ** 2 * (1.0 - tail) / (1.0 - g * g) + tail
    elif past_end == "truncate":
        mass = 1.0 - g ** r
        below = (1.0 - g ** (kk - 1.0)) / mass
        pmf = (1.0 - g) * g ** (kk - 1.0) / mass
        p_low = (1.0 - g) / mass
        p_high = (1.0 - g) * g ** (r - 1.0) / mass
        p_same = (1.0 - g) ** 2 * (1.0 - g ** (2.0 * r)) / (1.0 - g * g) / mass ** 2
    else:
        raise ValueError(f"unknown past_end {past_end!r}")
    pit = np.where(inside, np.minimum(below + np.asarray(v) * pmf, np.nextafter(1.0, 0.0)), np.nan)
    return LawRows(pit, k == 1, k == room, p_low, p_high, p_same)
