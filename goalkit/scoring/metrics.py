"""Offline scores and their bootstrap intervals over episodes.

- action error: Euclidean distance between the policy's action and the logged action, averaged
  over rows (a resample's mean is the ratio of its drawn episodes' sums to their row counts);
- Spearman's rank correlation between predicted values and negative steps-to-goal: Pearson's
  correlation of average ranks (ties share the mean of their ranks);
- ROC AUC of the value for reachable vs unreachable goals, by the Mann-Whitney statistic on
  average ranks: ``(R1 - n1 (n1 + 1) / 2) / (n1 n0)`` with ``R1`` the rank sum of the
  reachable rows (Hanley and McNeil, 1982, Radiology 143, eq. 2; from memory).

Intervals resample whole episodes, the independent units of clustered rows (as in
:mod:`goalkit.thresholds.bootstrap`): resample ``b`` draws ``G`` episodes with replacement; an episode
drawn ``c`` times counts its rows ``c`` times. Every statistic of a resample is computed on
those weights, which equals computing it on the expanded rows (ranks of the expanded data are
the weighted average ranks). The interval is the percentile interval: the ``(1 - c) / 2`` and
``(1 + c) / 2`` quantiles (numpy's ``"linear"``, Hyndman and Fan, 1996, definition 7) of the
defined resampled values, as :func:`scipy.stats.bootstrap` computes it with
``method="percentile"``. Resamples where a statistic is undefined (no row, no spread, one class
only) are left out and counted. Draws come from :mod:`goalkit.rng` (``draw_episodes``), so a
seed gives the same interval whatever the batch size.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from goalkit import rng

#: goalkit.rng stream of the episode resamples (its own number: rng.STREAMS uses 1-9, the demo
#: 1001-1005, suites 2001-2002).
ASSESS_STREAM = 2003
#: Resamples evaluated together (bounds memory: block x rows float64 arrays).
BLOCK_CELLS = 4_000_000
#: Up to this many episodes, resampled rank statistics use the closed form of
#: :func:`_closed_form` (cost per resample ~ episodes**3, independent of the rows); above it,
#: each resample's rows are ranked again (cost per resample ~ rows).
CLOSED_FORM_MAX_GROUPS = 120


@dataclass(frozen=True)
class Interval:
    """A point estimate with its bootstrap percentile interval.

    Attributes
    ----------
    estimate, low, high : float
        NaN when undefined.
    n_undefined : int
        Resamples where the statistic was undefined (left out).
    """

    estimate: float
    low: float
    high: float
    n_undefined: int = 0

    def as_dict(self) -> dict:
        """JSON-able form (NaN as None)."""
        f = (lambda v: None if not np.isfinite(v) else float(v))
        return {"estimate": f(self.estimate), "low": f(self.low), "high": f(self.high),
                "n_undefined": int(self.n_undefined)}


def draw_episodes(n_groups: int, n_resamples: int, seed: int) -> np.ndarray:
    """Episode draws of ``n_resamples`` resamples, int64 (B, G), from goalkit.rng."""
    b = np.arange(n_resamples, dtype=np.int64)[:, None]
    k = np.arange(n_groups, dtype=np.int64)[None, :]
    if n_groups == 0 or n_resamples == 0:
        return np.zeros((n_resamples, n_groups), np.int64)
    return rng.integers(seed, 0, n_groups, episode=b, step=k, stream=ASSESS_STREAM).astype(np.int64)


def draw_counts(draws: np.ndarray, n_groups: int) -> np.ndarray:
    """How often each episode is drawn in each resample, float64 (B, G)."""
    draws = np.asarray(draws, np.int64)
    b = draws.shape[0]
    flat = (np.arange(b, dtype=np.int64)[:, None] * n_groups + draws).ravel()
    return np.bincount(flat, minlength=b * n_groups).reshape(b, n_groups).astype(np.float64)


def percentile_interval(estimate: float, distribution: np.ndarray, confidence: float) -> Interval:
    """The percentile interval of the finite values of ``distribution``."""
    d = np.asarray(distribution, np.float64)
    ok = np.isfinite(d)
    if not ok.any():
        return Interval(float(estimate), np.nan, np.nan, int(d.size))
    a = (1.0 - confidence) / 2.0
    low, high = np.quantile(d[ok], [a, 1.0 - a])
    return Interval(float(estimate), float(low), float(high), int((~ok).sum()))


# ---- rank statistics on weighted rows --------------------------------------------------------
def weighted_ranks(x, w) -> np.ndarray:
    """Average ranks of ``x`` when row ``i`` counts ``w[b, i]`` times, per row of ``w`` (B, n).

    Equal to ``scipy.stats.rankdata`` (method ``"average"``) of the expanded data, at each
    original row; rows of weight 0 get a rank that never counts.
    """
    x = np.asarray(x, np.float64)
    w = np.atleast_2d(np.asarray(w, np.float64))
    if x.size == 0:
        return np.zeros_like(w)
    order = np.argsort(x, kind="stable")
    xs = x[order]
    new = np.r_[True, xs[1:] != xs[:-1]]
    starts = np.flatnonzero(new)
    block = np.cumsum(new) - 1
    bw = np.add.reduceat(w[:, order], starts, axis=1)
    rank_block = np.cumsum(bw, axis=1) - bw + (bw + 1.0) / 2.0
    ranks = np.empty_like(w)
    ranks[:, order] = rank_block[:, block]
    return ranks


def _weighted_pearson(a, b, w) -> np.ndarray:
    sw = w.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ma = (w * a).sum(axis=1) / sw
        mb = (w * b).sum(axis=1) / sw
        da, db = a - ma[:, None], b - mb[:, None]
        cov = (w * da * db).sum(axis=1)
        va, vb = (w * da * da).sum(axis=1), (w * db * db).sum(axis=1)
        r = cov / np.sqrt(va * vb)
    r[~(va > 0) | ~(vb > 0)] = np.nan
    return np.clip(r, -1.0, 1.0)


def spearman_weighted(x, y, w) -> np.ndarray:
    """Spearman's rho of (x, y) per row of weights ``w`` (B, n); NaN when undefined."""
    w = np.atleast_2d(np.asarray(w, np.float64))
    return _weighted_pearson(weighted_ranks(x, w), weighted_ranks(y, w), w)


def roc_auc_weighted(score, label, w) -> np.ndarray:
    """ROC AUC of ``score`` for ``label == 1`` vs ``0`` per row of weights ``w`` (B, n)."""
    w = np.atleast_2d(np.asarray(w, np.float64))
    pos = np.asarray(label).astype(bool)
    r = weighted_ranks(score, w)
    n1 = (w * pos).sum(axis=1)
    n0 = (w * ~pos).sum(axis=1)
    r1 = (w * r * pos).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        auc = (r1 - n1 * (n1 + 1.0) / 2.0) / (n1 * n0)
    auc[~(n1 > 0) | ~(n0 > 0)] = np.nan
    return auc


def spearman(x, y) -> float:
    """Spearman's rank correlation of two samples (NaN when either is constant or empty)."""
    x = np.asarray(x, np.float64)
    return float(spearman_weighted(x, y, np.ones((1, x.size)))[0]) if x.size > 1 else float("nan")


def roc_auc(score, label) -> float:
    """ROC AUC of ``score`` for ``label`` 1 vs 0 (NaN without both classes)."""
    score = np.asarray(score, np.float64)
    return float(roc_auc_weighted(score, label, np.ones((1, score.size)))[0])


# ---- the closed form over episodes -----------------------------------------------------------
def _rank_parts(x, group, n_groups: int) -> np.ndarray:
    """``A[i, e]``: rows of episode ``e`` below ``x_i`` plus half of those equal to it (``i`` included).

    With episode ``e`` counted ``W[e]`` times, row ``i``'s average rank in the expanded data is
    ``A[i] @ W + 1/2``. Shape (n, G), rows contiguous.
    """
    x = np.asarray(x, np.float64)
    order = np.argsort(x, kind="stable")
    xs = x[order]
    new = np.r_[True, xs[1:] != xs[:-1]]
    block = np.empty(x.size, np.int64)
    block[order] = np.cumsum(new) - 1
    c = np.zeros((int(new.sum()), n_groups))
    np.add.at(c, (block, group), 1.0)
    part = np.cumsum(c, axis=0) - c / 2.0
    return part[block]


def _closed_form(stat, x, y, group, n_groups: int, counts: np.ndarray) -> np.ndarray:
    """``stat`` of every resample (episode draw counts ``counts``, (B, G)) without re-ranking rows.

    Row ``i`` of episode ``e_i`` has weight ``W[e_i]`` and rank ``A_i @ W + 1/2``, so the weighted
    sums of Spearman's and the Mann-Whitney statistic are polynomials in ``W`` whose
    coefficients are sums over each episode's rows, computed once: ``sum_i w_i r_i s_i =
    sum_e W_e (W' T_e W + W' (a_e + b_e) / 2 + n_e / 4)`` with ``T_e = sum_{i in e} A_i B_i'``.
    The weighted mean rank is always ``(N + 1) / 2``. Equal to the per-resample ranking of
    :func:`spearman_weighted` / :func:`roc_auc_weighted` up to rounding (a test checks both).
    """
    order = np.argsort(group, kind="stable")
    group = np.asarray(group, np.int64)[order]
    x = np.asarray(x, np.float64)[order]
    y = np.asarray(y)[order]
    g = n_groups
    bounds = np.searchsorted(group, np.arange(g + 1))
    spans = list(zip(bounds[:-1], bounds[1:]))
    n_e = np.diff(bounds).astype(np.float64)
    W = np.asarray(counts, np.float64)
    N = W @ n_e
    A = _rank_parts(x, group, g)
    row_sums = (lambda M: np.stack([M[a:b].sum(axis=0) for a, b in spans]))  # (G', G)
    if stat is roc_auc_weighted:
        pos = y.astype(bool)
        a1 = row_sums(A * pos[:, None])
        n1e = np.bincount(group[pos], minlength=g).astype(np.float64)
        n1, n0 = W @ n1e, W @ (n_e - n1e)
        r1 = np.einsum("bp,bq,pq->b", W, W, a1, optimize=True) + n1 / 2.0
        with np.errstate(invalid="ignore", divide="ignore"):
            out = (r1 - n1 * (n1 + 1.0) / 2.0) / (n1 * n0)
        out[~(n1 > 0) | ~(n0 > 0)] = np.nan
        return out
    B = _rank_parts(np.asarray(y, np.float64), group, g)
    sa, sb = row_sums(A), row_sums(B)

    def weighted_products(P, Q, sp, sq):
        T = np.stack([P[a:b].T @ Q[a:b] for a, b in spans])  # (G', G, G)
        return (np.einsum("bp,bq,br,pqr->b", W, W, W, T, optimize=True)
                + np.einsum("bp,bq,pq->b", W, W, sp + sq, optimize=True) / 2.0 + N / 4.0)

    m2 = N * ((N + 1.0) / 2.0) ** 2
    cov = weighted_products(A, B, sa, sb) - m2
    vx = weighted_products(A, A, sa, sa) - m2
    vy = weighted_products(B, B, sb, sb) - m2
    tol = 1e-10 * N ** 3  # rounding of the sums; a real spread of ranks is at least about N**2 / 4
    with np.errstate(invalid="ignore", divide="ignore"):
        r = cov / np.sqrt(vx * vy)
    r[~(vx > tol) | ~(vy > tol)] = np.nan
    return np.clip(r, -1.0, 1.0)


def _resampled(stat, x, y, group, n_groups: int, counts: np.ndarray) -> np.ndarray:
    """``stat`` of every resample: the closed form for few episodes, else ranking each resample."""
    if counts.shape[0] == 0:
        return np.zeros(0)
    if n_groups <= CLOSED_FORM_MAX_GROUPS and stat in (spearman_weighted, roc_auc_weighted) and len(x):
        return _closed_form(stat, x, y, group, n_groups, counts)
    dist = np.full(counts.shape[0], np.nan)
    for a, b in _blocks(counts.shape[0], len(x)):
        dist[a:b] = stat(x, y, counts[a:b][:, group])
    return dist


# ---- bootstrap over episodes -----------------------------------------------------------------
def _blocks(n_resamples: int, n_rows: int):
    step = max(1, BLOCK_CELLS // max(n_rows, 1))
    for a in range(0, n_resamples, step):
        yield a, min(n_resamples, a + step)


def mean_by_group_interval(values, group, n_groups: int, draws, confidence: float, *, strata=None,
                           n_strata: int = 1) -> list[Interval]:
    """Mean of ``values`` (per stratum) and its episode-bootstrap interval.

    Parameters
    ----------
    values : array of float, shape (n,)
    group : array of int, shape (n,)
        Episode index 0..G-1 of each row.
    n_groups : int
    draws : array of int, shape (B, G)
        Episode draws of each resample.
    confidence : float
    strata : array of int, shape (n,), optional
        Stratum 0..K-1 of each row (e.g. a horizon bucket); one interval per stratum.
    n_strata : int

    Returns
    -------
    list of Interval, one per stratum
    """
    values = np.asarray(values, np.float64)
    group = np.asarray(group, np.int64)
    strata = np.zeros(values.size, np.int64) if strata is None else np.asarray(strata, np.int64)
    cell = strata * n_groups + group
    sums = np.bincount(cell, weights=values, minlength=n_strata * n_groups).reshape(n_strata, n_groups)
    counts = np.bincount(cell, minlength=n_strata * n_groups).reshape(n_strata, n_groups).astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        est = sums.sum(axis=1) / counts.sum(axis=1)
        w = draw_counts(draws, n_groups)
        dist = (w @ sums.T) / (w @ counts.T)  # (B, K)
    return [percentile_interval(est[k], dist[:, k], confidence) for k in range(n_strata)]


def rank_stat_interval(stat, x, y, group, n_groups: int, draws, confidence: float) -> Interval:
    """A weighted rank statistic (:func:`spearman_weighted` or :func:`roc_auc_weighted`) with its interval.

    ``stat(x, y, w)`` is evaluated with unit weights (the estimate) and with each resample's
    row weights (an episode's draw count); for Spearman and ROC AUC on up to
    :data:`CLOSED_FORM_MAX_GROUPS` episodes, through the closed form of :func:`_closed_form`.
    """
    x = np.asarray(x, np.float64)
    group = np.asarray(group, np.int64)
    est = float(stat(x, y, np.ones((1, x.size)))[0]) if x.size else float("nan")
    dist = _resampled(stat, x, y, group, n_groups, draw_counts(draws, n_groups))
    return percentile_interval(est, dist, confidence)


def rank_stat_difference(stat, x_a, x_b, y, group, n_groups: int, draws, confidence: float) -> Interval:
    """``stat(x_a, y) - stat(x_b, y)`` with its interval on the same resamples."""
    group = np.asarray(group, np.int64)
    n = np.asarray(x_a).size
    one = np.ones((1, n))
    est = float(stat(x_a, y, one)[0] - stat(x_b, y, one)[0]) if n else float("nan")
    counts = draw_counts(draws, n_groups)
    dist = _resampled(stat, x_a, y, group, n_groups, counts) - _resampled(stat, x_b, y, group, n_groups, counts)
    return percentile_interval(est, dist, confidence)
