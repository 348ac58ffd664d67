"""Tuning a region rule: where its bounds should sit, from labelled pairs.

A region rule (``distance = "region"``, :mod:`goalkit.reward`) has a signed distance: the
largest amount by which ``achieved - goal`` lies outside the bounds (negative inside). Moving
every finite bound outwards by ``m`` reaches exactly the pairs with distance ``<= m``, so
tuning the rule's margin on the labels is tuning the bounds' position. The threshold sweep
(:mod:`goalkit.thresholds.metrics`) works on distances ``>= 0``; here the signed distances are
shifted by their smallest finite value before the sweep and the chosen margin shifted back,
and the suggested rule keeps the bounds with the chosen margin as its threshold; the report
states the bounds that amounts to (``moved_bounds``, e.g. ``delta0 >= -0.02``).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np


def is_region(rule) -> bool:
    """True for a region rule."""
    return rule.distance_name == "region"


def shift_of(d) -> float:
    """The amount subtracted from signed region distances ``d`` so the sweep sees values >= 0.

    Rows whose kept dimensions are all unbounded have distance ``-inf`` (always reached); they
    are placed at the smallest finite distance.
    """
    d = np.asarray(d, dtype=np.float64)
    finite = d[np.isfinite(d)]
    return float(finite.min()) if finite.size else 0.0


def sweep_distances(d, shift: float) -> np.ndarray:
    """Signed distances ``d`` shifted to ``>= 0`` (``-inf`` to 0)."""
    d = np.asarray(d, dtype=np.float64) - shift
    return np.where(np.isneginf(d), 0.0, np.maximum(d, 0.0))


def shifted_back(choice, interval, shift: float):
    """A threshold choice and its interval (or None) from sweep units back to margins."""
    choice = replace(choice, threshold=choice.threshold + shift, candidate=choice.candidate + shift)
    if interval is not None:
        interval = replace(interval, low=interval.low + shift, high=interval.high + shift,
                           distribution=np.asarray(interval.distribution) + shift)
    return choice, interval


def moved_bounds(rule, margin: float):
    """``rule`` with every finite bound moved outwards by ``margin`` and its margin set to 0.

    Examples
    --------
    >>> from goalkit.reward import RewardRule
    >>> r = moved_bounds(RewardRule("region", lower=(0.0,), upper=(math.inf,)), 0.02)
    >>> r.lower, r.upper, r.threshold
    ((-0.02,), (inf,), 0.0)
    """
    lower = tuple(x - margin if math.isfinite(x) else x for x in rule.lower)
    upper = tuple(x + margin if math.isfinite(x) else x for x in rule.upper)
    return rule.replace(lower=lower, upper=upper, threshold=0.0)


def describe_bounds(rule) -> str:
    """One line per dimension, ``d0 >= 0.45`` style, relative to the goal (``delta = achieved - goal``)."""
    parts = []
    for k, (lo, hi) in enumerate(zip(rule.lower, rule.upper)):
        if math.isfinite(lo) and math.isfinite(hi):
            parts.append(f"{lo:.6g} <= delta{k} <= {hi:.6g}")
        elif math.isfinite(lo):
            parts.append(f"delta{k} >= {lo:.6g}")
        elif math.isfinite(hi):
            parts.append(f"delta{k} <= {hi:.6g}")
    return ", ".join(parts) or "every dimension free"
