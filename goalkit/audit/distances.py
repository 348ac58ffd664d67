"""The documented goal distances (docs/reward.md), written a second time for the audit."""

from __future__ import annotations

import numpy as np


def rule_distance(kind: str, a, g, weights=None, threshold=None, mask=None, lower=None,
                  upper=None) -> np.ndarray:
    """Distance of rows of ``a`` to rows of ``g`` (both (M, G)), float64 (M,).

    Parameters
    ----------
    kind : {"euclidean", "l1", "chebyshev", "cosine", "box", "region"}
    a, g : array_like (M, G)
        Achieved goals phi(s_t+1) and goals.
    weights : sequence of float, optional
        Per-dimension weights (euclidean weights the squared difference, l1 and chebyshev the
        absolute difference, cosine the products).
    threshold : sequence of float
        Per-dimension tolerances of ``box``.
    mask : array_like (M, G), optional
        Goal masks: only dimensions with a nonzero entry count (left out of sums and maxima).
    lower, upper : sequence of float
        The bounds of ``achieved - goal`` of ``region``; its distance is the largest of
        ``lower - delta`` and ``delta - upper`` over the kept dimensions (negative inside).

    Returns
    -------
    ndarray of float64
    """
    a = np.asarray(a, dtype=np.float64)
    g = np.asarray(g, dtype=np.float64)
    w = np.ones(a.shape[1]) if weights is None else np.asarray(weights, dtype=np.float64)
    keep = True if mask is None else np.asarray(mask) != 0
    if kind == "region":
        delta = a - g
        over = np.maximum(np.asarray(lower, np.float64) - delta, delta - np.asarray(upper, np.float64))
        return np.where(keep, over, -np.inf).max(axis=1, initial=-np.inf)
    if mask is not None:   # without a mask every dimension counts: the weights as they are, per row
        w = np.where(keep, w, 0.0)
    diff = np.subtract(a, g)
    np.abs(diff, out=diff)
    if kind == "euclidean":
        if weights is None and mask is None:   # every weight 1: w * d * d is d * d, exactly
            return np.sqrt(np.multiply(diff, diff, out=diff).sum(axis=1))
        return np.sqrt((w * diff * diff).sum(axis=1))
    if kind == "l1":
        return (w * diff).sum(axis=1)
    if kind == "chebyshev":
        return (w * diff).max(axis=1, initial=0.0)
    if kind == "box":
        return np.where(keep, diff / np.asarray(threshold, dtype=np.float64), 0.0).max(axis=1, initial=0.0)
    if kind == "cosine":
        na = (w * a * a).sum(axis=1)
        ng = (w * g * g).sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            d = 1.0 - (w * a * g).sum(axis=1) / np.sqrt(na * ng)
        d = np.where((na == 0) & (ng == 0), 0.0, np.where((na == 0) | (ng == 0), 1.0, d))
        return np.clip(d, 0.0, 2.0)
    raise ValueError(f"unknown distance {kind!r}")
