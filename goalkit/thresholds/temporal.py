"""A label-free threshold from the logs' temporal order, meaningful when episodes overlap.

The rule-of-thumb range of :mod:`goalkit.thresholds.session` takes its high end from the
distance to the nearest state of *another* episode. When episodes overlap (many runs through
the same states, as in recordings of one environment), that distance is tiny and the range
comes out empty. The evidence used here is different: *how many logged steps separate two
states*, read from the logs' graph (:class:`goalkit.goals.stategraph.StateGraph`, logged
transitions plus joins of identical goal vectors of different episodes, found exactly by sorting
the vectors: :func:`goalkit.goals.stategraph.identical_joins`, at most ``JOIN_NEIGHBOURS`` per
state).

Pairs of states are drawn (same-episode pairs a few steps and many steps apart, and random
pairs), their steps apart measured in the graph, and split into

* *near*: at most ``near_steps`` steps apart (the goal is one step away, or reached);
* *far*: at least ``far_steps`` steps apart (the goal is clearly not reached yet);

pairs in between, and pairs the graph does not connect within ``far_steps * 4`` steps, are
not used. Cross-episode pairs that merely lie close in goal space are therefore never
counted as "far": overlapping episodes do not pull the recommendation down.

The recommendation is the threshold that best separates near from far pairs by goal distance
alone: the largest Youden's J = TPR - FPR (Youden, 1950, "Index for rating diagnostic
tests", Cancer 3(1)) of the rule "distance <= threshold" with near pairs as positives. Also
reported: the knee of the rewarded-share curve of the future pairs (largest distance from the
chord of the normalised curve, the "Kneedle" construction of Satopaa et al., 2011, ICDCS
workshops; from memory), a second opinion resting on the shape of that curve only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from goalkit import rng
from goalkit.goals.stategraph import UNREACHABLE, StateGraph, identical_joins, state_episodes, transition_edges

#: Pairs drawn per kind (same episode, other episode).
PAIRS = 20_000
#: Other states a state joins at most (of those with an identical goal vector).
JOIN_NEIGHBOURS = 8


@dataclass(frozen=True)
class TemporalThreshold:
    """Result of :func:`temporal_threshold` (JSON-able through :meth:`as_dict`)."""

    threshold: float | None
    youden_j: float | None
    tpr: float | None
    fpr: float | None
    knee: float | None
    near_pairs: int
    far_pairs: int
    near_steps: int
    far_steps: int
    basis: str

    def as_dict(self) -> dict:
        return dict(self.__dict__)


def _pairs(offsets, seed, n, near_steps, far_steps):
    """Same-episode pairs (s_t, s_t+k): half with k on 0..near_steps, half on far_steps..4 far_steps
    (cut at the episode's end); and as many random pairs of any two states."""
    lengths = np.diff(offsets)
    E = len(lengths)
    idx = np.arange(n, dtype=np.int64)
    ep = rng.integers(seed, 0, E, idx, 0, 0, "subsample")
    t = rng.integers(seed, 0, lengths[ep] + 1, idx, 1, 0, "subsample")
    lo = np.where(idx % 2 == 0, 0, far_steps)
    hi = np.where(idx % 2 == 0, near_steps, 4 * far_steps) + 1
    k = rng.integers(seed, lo, hi, idx, 2, 0, "subsample")
    first = offsets[ep] + ep
    a, b = first + t, first + np.minimum(t + k, lengths[ep])
    total = int(offsets[-1] + E)
    u = rng.integers(seed, 0, total, idx, 3, 0, "subsample")
    v = rng.integers(seed, 0, total, idx, 4, 0, "subsample")
    return np.concatenate([a, u]), np.concatenate([b, v])


def youden_threshold(near_d, far_d):
    """The threshold maximising TPR - FPR of ``d <= threshold`` (near = positive); (thr, J, TPR, FPR)."""
    near_d = np.sort(np.asarray(near_d, dtype=np.float64))
    far_d = np.sort(np.asarray(far_d, dtype=np.float64))
    cand = np.unique(np.concatenate([near_d, far_d]))
    tpr = np.searchsorted(near_d, cand, side="right") / len(near_d)
    fpr = np.searchsorted(far_d, cand, side="right") / len(far_d)
    j = tpr - fpr
    k = int(np.argmax(j))  # the smallest threshold of the best J
    return float(cand[k]), float(j[k]), float(tpr[k]), float(fpr[k])


def knee(d, points: int = 200):
    """Knee of the rewarded-share curve share(thr) = P(d <= thr) on [0, q99]: largest gap above the chord."""
    d = np.sort(np.asarray(d, dtype=np.float64))
    top = float(np.quantile(d, 0.99)) if len(d) else 0.0
    if top <= 0:
        return None
    x = np.linspace(0.0, top, points)
    y = np.searchsorted(d, x, side="right") / len(d)
    yn = (y - y[0]) / max(y[-1] - y[0], 1e-12)
    return float(x[int(np.argmax(yn - x / top))])


def pair_steps(graph: StateGraph, transition_offsets, joined, sources, targets) -> np.ndarray:
    """``graph.distances(sources, targets)``, with the searches left out where the answer is known.

    From a state whose episode has no joined state at or after it, the only way on is its
    own episode: the path to a later state of that episode is the steps between them (when
    at most the graph's horizon), and no other state is reachable. Only the other pairs are
    searched.

    Parameters
    ----------
    graph : StateGraph
    transition_offsets : ndarray of int64 (E + 1,)
    joined : ndarray of int64
        States with a join (either end of a join pair; repeats allowed).
    sources, targets : ndarray of int64 (M,)
    """
    off = np.asarray(transition_offsets, dtype=np.int64)
    src = np.asarray(sources, dtype=np.int64)
    tgt = np.asarray(targets, dtype=np.int64)
    episode = state_episodes(off)
    last = off[1:] + np.arange(1, off.size, dtype=np.int64)          # one past each episode's last state
    flag = np.zeros(graph.n_states_ + 1, np.int64)
    flag[np.asarray(joined, dtype=np.int64)] = 1
    after = np.cumsum(flag[::-1])[::-1]                                # joined states at rows >= r
    free = (after[src] - after[last[episode[src]]]) == 0
    gap = tgt - src
    horizon = graph.horizon_
    reach = (episode[tgt] == episode[src]) & (gap >= 0) & (True if horizon is None else gap <= horizon)
    out = np.where(reach, gap, UNREACHABLE)
    search = np.flatnonzero(~free)
    if search.size:
        out[search] = graph.distances(src[search], tgt[search])
    return out


def temporal_threshold(goals, transition_offsets, distance, *, near_steps: int = 1, far_steps: int = 10,
                       seed: int = 0, pairs: int = PAIRS, mask=None) -> TemporalThreshold:
    """Recommend a goal threshold from the logs' temporal order (no labels).

    Parameters
    ----------
    goals : ndarray, shape (N, G)
        phi of every state of the (sampled) episodes, in state order.
    transition_offsets : ndarray of int64, shape (E + 1,)
    distance : callable
        ``distance(a, b) -> (M,)`` goal distance of the reward rule (e.g. ``rule.distance``).
    near_steps, far_steps : int
        Pairs at most ``near_steps`` apart are near, at least ``far_steps`` apart far.
    seed : int
    pairs : int
        Pairs drawn of each kind (same episode, other episode).
    mask : ndarray of uint8, shape (N, G), optional
        The goal dimensions of each state's episode task mask: a pair ``(a, b)`` is compared
        on ``a``'s dimensions only (``distance(x[a], x[b], mask[a])``), and states join in the
        graph on the dimensions of their own mask; None: every one.
    """
    off = np.asarray(transition_offsets, dtype=np.int64)
    x = np.asarray(goals, dtype=np.float64)
    # with masks, states join on the dimensions of their own mask only (x * 1 == x: a full mask
    # changes no bit), so a dimension no mask keeps never changes the graph
    # joins of identical goal vectors only (join radius 0), found exactly by sorting
    tail, head = transition_edges(off)
    ju, jv = identical_joins(x if mask is None else x * mask, off, JOIN_NEIGHBOURS)
    graph = StateGraph(x.shape[0], np.concatenate([tail, ju, jv]), np.concatenate([head, jv, ju]),
                       n_joins=len(ju), horizon=4 * int(far_steps), n_transitions=len(tail))
    a, b = _pairs(off, seed, int(pairs), int(near_steps), int(far_steps))
    steps = pair_steps(graph, off, np.concatenate([ju, jv]), a, b)
    near = (steps >= 0) & (steps <= near_steps)
    far = steps >= far_steps
    d = np.asarray(distance(x[a], x[b]) if mask is None else distance(x[a], x[b], mask[a]), dtype=np.float64)
    basis = (f"steps between logged states (the logs' graph: transitions and identical states of other "
             f"episodes): pairs <= {near_steps} step(s) apart against pairs >= {far_steps} steps apart; "
             f"best Youden's J of 'distance <= threshold'")
    fut = steps >= 0
    kn = knee(d[fut]) if fut.any() else None
    if near.sum() < 10 or far.sum() < 10:
        return TemporalThreshold(None, None, None, None, kn, int(near.sum()), int(far.sum()), near_steps,
                                 far_steps, basis + " (too few pairs)")
    thr, j, tpr, fpr = youden_threshold(d[near], d[far])
    return TemporalThreshold(thr, j, tpr, fpr, kn, int(near.sum()), int(far.sum()), near_steps, far_steps, basis)
