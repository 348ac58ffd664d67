"""Bootstrap confidence interval of a chosen threshold, resampling whole episodes.

Pairs from one episode are correlated (consecutive steps look alike), so resampling pairs
would understate the spread. Instead each resample draws ``G`` episodes (groups) with
replacement out of the ``G`` present (resample the independent units, which for clustered
data are the clusters: Davison and Hinkley, 1997, sec. 3.8, from memory), takes all
their pairs (an episode drawn twice counts twice), and re-runs the chooser. The interval is
the percentile interval: the ``(1 - c) / 2`` and ``(1 + c) / 2`` quantiles of the finite
resampled thresholds, numpy's ``"linear"`` quantile (Hyndman and Fan, 1996, definition 7).

Resample ``b`` draws its ``k``-th episode as
``goalkit.rng.integers(seed, 0, G, episode=b, step=k, stream=BOOTSTRAP_STREAM)``, so the
result is byte-identical for a seed whatever the block size. Resamples where the choice is
undefined (e.g. no reached pair drawn) are dropped and counted in ``n_undefined``.

Resamples are evaluated as weighted sweeps over one sort of the pairs (weights = how often
each pair's episode was drawn), in blocks of resamples so memory stays bounded. For ``max-f1``
and ``youden`` only the ends of runs of candidates of one label can hold the choice, so the
counts are summed per such run and episode (:mod:`goalkit.thresholds.segments`; the same
choices, far less work); ``target-precision`` sweeps every candidate (:func:`dense_thresholds`).
"""

from __future__ import annotations

from goalkit.errors import shown

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from goalkit import rng
from goalkit.errors import TuningError
from goalkit.thresholds.metrics import _run_ends, check_chooser, check_labelled, choose_index, place
from goalkit.thresholds.segments import SEGMENT_CHOOSERS, SegmentedPairs

#: Threads computing blocks of resamples at once (at most two; the CPUs this process may use).
THREADS = max(1, min(2, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1))
#: goalkit.rng stream of the bootstrap draws (its own stream, so it shares no numbers with a build).
BOOTSTRAP_STREAM = rng.STREAMS["bootstrap"]


@dataclass(frozen=True)
class ThresholdInterval:
    """A bootstrap percentile interval of a chosen threshold.

    Attributes
    ----------
    low, high : float
        Interval ends (NaN when no resample gave a defined choice).
    confidence : float
        Nominal coverage, e.g. 0.95.
    distribution : ndarray of float64, shape (n_resamples,)
        Chosen threshold of each resample (NaN where undefined).
    n_undefined : int
        Resamples with an undefined choice (left out of the interval).
    n_groups : int
        Episodes (groups) resampled.
    seed : int or None
        The seed of the draws (None when explicit resamples were given).
    """

    low: float
    high: float
    confidence: float
    distribution: np.ndarray
    n_undefined: int
    n_groups: int
    seed: int | None

    @property
    def n_resamples(self) -> int:
        """Number of resamples."""
        return int(self.distribution.size)

    def as_dict(self) -> dict:
        """JSON-able summary (without the distribution)."""
        return {"low": self.low, "high": self.high, "confidence": self.confidence,
                "n_resamples": self.n_resamples, "n_undefined": self.n_undefined,
                "n_groups": self.n_groups, "seed": self.seed}


def resample_groups(n_groups: int, n_resamples: int, seed: int, start: int = 0) -> np.ndarray:
    """Return group draws of resamples ``start .. start + n_resamples - 1``, int64 (B, G).

    Examples
    --------
    >>> a = resample_groups(5, 3, seed=1)
    >>> a.shape, bool((a == resample_groups(5, 3, seed=1)).all())
    ((3, 5), True)
    >>> bool((resample_groups(5, 2, seed=1, start=1) == a[1:]).all())
    True
    """
    b = np.arange(start, start + n_resamples, dtype=np.int64)[:, None]
    k = np.arange(n_groups, dtype=np.int64)[None, :]
    return rng.integers(seed, 0, n_groups, episode=b, step=k, slot=0, stream=BOOTSTRAP_STREAM)


def bootstrap_threshold(distances, labels, groups=None, *, chooser: str = "max-f1", target=None,
                        placement: str = "midpoint", inclusive: bool = True,
                        n_resamples: int = 1000, confidence: float = 0.95, seed: int = 0,
                        resamples=None, max_cells: int = 2_000_000) -> ThresholdInterval:
    """Bootstrap the chosen threshold over episodes.

    Parameters
    ----------
    distances, labels : array_like, shape (M,)
        Labelled distances (see :func:`goalkit.thresholds.metrics.sweep_thresholds`).
    groups : array_like of int, shape (M,), optional
        Episode of each pair; None makes every pair its own group (then the interval
        ignores within-episode correlation).
    chooser, target, placement, inclusive
        As in :func:`goalkit.thresholds.metrics.choose_threshold`.
    n_resamples : int
        Number of bootstrap resamples.
    confidence : float
        Coverage of the percentile interval, in (0, 1).
    seed : int
        Seed of the draws (goalkit.rng).
    resamples : array_like of int, shape (B, G), optional
        Explicit draws instead of seeded ones: row ``b`` lists the group positions (0..G-1,
        groups in ascending id order) of resample ``b``.
    max_cells : int
        Work-array budget (resamples per block times pairs).

    Returns
    -------
    ThresholdInterval

    Examples
    --------
    >>> d = [0.1, 0.2, 0.3, 0.6, 0.7, 0.8]
    >>> iv = bootstrap_threshold(d, [1, 1, 1, 0, 0, 0], [0, 0, 1, 1, 2, 2], n_resamples=50, seed=3)
    >>> iv.n_resamples, iv.n_groups
    (50, 3)
    """
    check_chooser(chooser, target, placement)
    d, y, g = check_labelled(distances, labels, groups)
    if not (0.0 < confidence < 1.0):
        raise TuningError(f"expected a confidence level in (0, 1), got {shown(confidence)}", key="confidence")
    if g is None:
        g = np.arange(d.size, dtype=np.int64)
    _, gi = np.unique(g, return_inverse=True)
    gi = gi.reshape(-1).astype(np.int64)
    n_groups = int(gi.max()) + 1
    if resamples is not None:
        resamples = np.asarray(resamples, dtype=np.int64)
        if resamples.ndim != 2 or resamples.size and (resamples.min() < 0 or resamples.max() >= n_groups):
            raise TuningError(f"expected resamples of shape (B, G) with entries in 0..{n_groups - 1}",
                              key="resamples")
        n_resamples = resamples.shape[0]
    elif n_resamples < 1:
        raise TuningError(f"expected n_resamples >= 1, got {n_resamples}", key="n_resamples")

    order = np.argsort(d, kind="stable")
    ds, ys, gs = d[order], y[order], gi[order]
    ends = _run_ends(ds)
    thresholds = ds[ends]
    out = np.empty(n_resamples, dtype=np.float64)

    def draws_of(start, stop):
        return (resamples[start:stop] if resamples is not None
                else resample_groups(n_groups, stop - start, seed, start))

    if chooser in SEGMENT_CHOOSERS:
        segs = SegmentedPairs(ys, gs, ends, n_groups)
        block = max(1, int(max_cells) // max(n_groups, segs.n_segments, 1))
        for start in range(0, n_resamples, block):  # blocks of resamples: memory O(block * groups)
            stop = min(n_resamples, start + block)
            out[start:stop] = segs.block(group_counts(draws_of(start, stop), n_groups), thresholds,
                                         chooser, placement, inclusive)
    else:
        threads = THREADS if n_resamples > 1 else 1
        block = max(1, int(max_cells) // (threads * max(d.size, 1)))   # the budget shared by the threads

        def one_block(start):
            stop = min(n_resamples, start + block)
            out[start:stop] = dense_thresholds(group_counts(draws_of(start, stop), n_groups), ds, ys, gs,
                                               ends, thresholds, chooser, target, placement, inclusive)

        starts = range(0, n_resamples, block)   # blocks of resamples; each fills its own part of out
        if threads > 1 and len(starts) > 1:     # numpy's sums and gathers release the GIL: two blocks at once
            with ThreadPoolExecutor(threads, thread_name_prefix="goalkit-bootstrap") as pool:
                list(pool.map(one_block, starts))
        else:
            for start in starts:
                one_block(start)
    finite = out[np.isfinite(out)]
    alpha = (1.0 - confidence) / 2.0
    if finite.size:
        low, high = (float(v) for v in np.quantile(finite, [alpha, 1.0 - alpha], method="linear"))
    else:
        low = high = float("nan")
    return ThresholdInterval(low=low, high=high, confidence=float(confidence), distribution=out,
                             n_undefined=int(out.size - finite.size), n_groups=n_groups,
                             seed=None if resamples is not None else int(seed))


def group_counts(draws, n_groups: int) -> np.ndarray:
    """How often each group is drawn in each resample: int64 (B, G) from draws (B, G')."""
    draws = np.asarray(draws, dtype=np.int64)
    b = draws.shape[0]
    flat = (np.arange(b, dtype=np.int64)[:, None] * n_groups + draws).ravel()
    return np.bincount(flat, minlength=b * n_groups).reshape(b, n_groups)


def dense_thresholds(counts, ds, ys, gs, ends, thresholds, chooser, target, placement,
                     inclusive) -> np.ndarray:
    """Chosen thresholds of resamples with group counts ``counts`` (B, G): a weighted sweep over
    every sorted pair (``ds``, ``ys``, ``gs``: distances, labels, group positions; ``ends``:
    last pair of each candidate ``thresholds``)."""
    w = np.asarray(counts)[:, gs]                       # (b, n) weight of each sorted pair
    tot = np.cumsum(w, axis=1)[:, ends]
    tp = np.cumsum(w * ys[None, :], axis=1)[:, ends]
    fp = tot - tp
    valid = np.diff(tot, axis=1, prepend=0) > 0
    idx = choose_index(thresholds, tp, fp, tp[:, -1], fp[:, -1], valid, chooser, target)
    return place(thresholds, valid, idx, placement, inclusive)
