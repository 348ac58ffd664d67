"""Label-free diagnostics of the goal space, to put a threshold in proportion.

* **one-step displacement**: ``d(phi(s_t), phi(s_{t+1}))`` per transition. A threshold far
  below its typical value means a goal is "reached" only by landing on it almost exactly.
* **displacement after h steps**: quantiles of ``d(phi(s_t), phi(s_{t+h}))`` for each ``h``
  (all ``t`` with ``t + h <= T``). The threshold's crossing of the median curve is roughly
  how many steps of motion count as "already there".
* **distance to other episodes**: for a sample of states, the distance to the nearest state
  (within the sample) of a *different* episode, found with an exact faiss ``IndexFlatL2``.
  A threshold above most of these makes goals from other episodes count as reached almost
  for free.
* **rewarded fraction**: for relabelled goal rows, the fraction rewarded by each strategy as
  a function of the threshold (vectorised: each row's place among the sorted thresholds,
  counted per strategy).

With goal masks (the recipe's ``[mask]`` table, :class:`goalkit.masks.GoalMasks`), only the
dimensions a goal constrains count: a state's mask is its episode's task mask (the table's
entry for the episode's task id, or ``others``), every displacement and other-episode distance
is the rule's distance over the mask of its first state, the nearest other-episode state is
searched in those dimensions only, and a rewarded fraction scores each goal row on its own
``goal_mask``. Without masks (``None``) nothing changes, and a full mask gives the same bits.

``d`` is the reward rule's distance (``RewardRule.distance``); for ``box`` it is the
normalised ``max_d |delta_d| / tol_d``, so thresholds are then scales of the current box
(1 = the recipe's tolerances). The nearest other-episode state is the nearest in plain
euclidean distance of the goal vectors (faiss); its distance is then reported in the rule's
distance as well.

The state sample is addressed by (seed, episode id, step) through :mod:`goalkit.rng`
(stream ``subsample``), so it does not depend on how the episodes were chunked.
"""

from __future__ import annotations

from goalkit.errors import shown

from dataclasses import dataclass

import numpy as np

from goalkit import rng
from goalkit.errors import TuningError
from goalkit.logs.episodes import EpisodeSet

#: Default quantiles of the displacement summaries.
QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)
#: Default horizons (steps) of the displacement profile.
HORIZONS = (1, 2, 4, 8, 16, 32)


def state_goals(episodes: EpisodeSet, goal_map) -> np.ndarray:
    """Goal vector of every state of ``episodes``, float64 (N + E, G)."""
    rows = np.arange(episodes.num_transitions + episodes.num_episodes, dtype=np.int64)
    return np.asarray(goal_map(episodes, rows), dtype=np.float64)


def state_masks(episodes: EpisodeSet, masks) -> np.ndarray | None:
    """The task mask of every state's episode, uint8 (N + E, G); None without ``masks``.

    Parameters
    ----------
    episodes : EpisodeSet
    masks : goalkit.masks.GoalMasks or None
        Episodes without a task id get the table's ``others`` mask.
    """
    if masks is None:
        return None
    tasks = (np.full(episodes.num_episodes, -1, np.int64) if episodes.task_ids is None
             else np.asarray(episodes.task_ids, np.int64))
    per_episode = masks.task_mask(tasks)
    return np.repeat(per_episode, episodes.lengths + 1, axis=0)


def _rows(mask, rows):
    return None if mask is None else mask[rows]


def _state_index(episodes: EpisodeSet):
    """Episode position, step and episode length of every state row."""
    lengths = episodes.lengths
    pos = np.repeat(np.arange(episodes.num_episodes, dtype=np.int64), lengths + 1)
    step = np.arange(pos.size, dtype=np.int64) - episodes.state_offsets()[pos]
    return pos, step, lengths[pos]


def step_displacement(episodes: EpisodeSet, goal_map, rule, goals=None, mask=None) -> np.ndarray:
    """One-step displacement ``d(phi(s_t), phi(s_{t+1}))`` of every transition, float64 (N,).

    ``goals`` may pass precomputed :func:`state_goals`; ``mask`` the :func:`state_masks`.
    """
    g = state_goals(episodes, goal_map) if goals is None else goals
    cur = episodes.current_state_rows()
    return rule.distance(g[episodes.next_state_rows()], g[cur], _rows(mask, cur))


@dataclass(frozen=True)
class HorizonProfile:
    """Quantiles of the displacement after ``h`` steps.

    Attributes
    ----------
    horizons : ndarray of int64 (H,)
    quantiles : ndarray of float64 (Q,)
    values : ndarray of float64 (H, Q)
        ``values[i, j]`` is the ``quantiles[j]``-quantile at ``horizons[i]`` (NaN when no
        episode is that long).
    counts : ndarray of int64 (H,)
        Number of (t, t + h) pairs behind each row.
    """

    horizons: np.ndarray
    quantiles: np.ndarray
    values: np.ndarray
    counts: np.ndarray

    def as_dict(self) -> dict:
        """JSON-able form."""
        return {"horizons": self.horizons.tolist(), "quantiles": self.quantiles.tolist(),
                "values": self.values.tolist(), "counts": self.counts.tolist()}


def _check_quantiles(quantiles):
    q = np.asarray(quantiles, dtype=np.float64)
    if q.ndim != 1 or q.size == 0 or np.any((q < 0) | (q > 1)):
        raise TuningError(f"expected quantiles in [0, 1], got {shown(list(np.atleast_1d(q)))}", key="quantiles")
    return q


def horizon_displacement(episodes: EpisodeSet, goal_map, rule, horizons=HORIZONS,
                         quantiles=QUANTILES, goals=None, mask=None) -> HorizonProfile:
    """Quantiles of ``d(phi(s_t), phi(s_{t+h}))`` over all ``t`` with ``t + h <= T``, per ``h``.

    ``mask`` (the :func:`state_masks`, optional): the dimensions each state's goals constrain.

    Examples
    --------
    >>> from goalkit.goals.goalmap import IndexGoalMap
    >>> from goalkit.reward import RewardRule
    >>> ep = EpisodeSet(observations=np.arange(5.0)[:, None], actions=np.zeros((4, 1)),
    ...                 offsets=np.array([0, 4]), episode_ids=np.array([0]))
    >>> p = horizon_displacement(ep, IndexGoalMap((0,)), RewardRule("euclidean", 1.0), [1, 3, 9], [0.5])
    >>> p.values[:, 0].tolist(), p.counts.tolist()
    ([1.0, 3.0, nan], [4, 2, 0])
    """
    h = np.asarray(horizons, dtype=np.int64)
    if h.ndim != 1 or h.size == 0 or np.any(h < 1):
        raise TuningError(f"expected horizons >= 1, got {shown(list(np.atleast_1d(h)))}", key="horizons")
    q = _check_quantiles(quantiles)
    g = state_goals(episodes, goal_map) if goals is None else goals
    _, step, length = _state_index(episodes)
    values = np.full((h.size, q.size), np.nan)
    counts = np.zeros(h.size, dtype=np.int64)
    for i, hh in enumerate(h.tolist()):  # a loop over horizons
        rows = np.flatnonzero(step + hh <= length)
        counts[i] = rows.size
        if rows.size:
            values[i] = np.quantile(rule.distance(g[rows + hh], g[rows], _rows(mask, rows)), q, method="linear")
    return HorizonProfile(h, q, values, counts)


def sample_states(episodes: EpisodeSet, size: int, seed: int) -> np.ndarray:
    """Rows of up to ``size`` states, chosen by the smallest ``goalkit.rng`` keys (sorted rows).

    The key of a state is addressed by (seed, episode id, step), so the same state gets the
    same key in any chunking of the log.
    """
    pos, step, _ = _state_index(episodes)
    key = rng.uniform(seed, episodes.episode_ids[pos], step, slot=0, stream="subsample")
    if size >= key.size:
        return np.arange(key.size, dtype=np.int64)
    pick = np.argsort(key, kind="stable")[:size]
    return np.sort(pick)


@dataclass(frozen=True)
class OtherEpisodeDistances:
    """Nearest state of another episode, for a sample of states.

    Attributes
    ----------
    rows : ndarray of int64 (S,)
        Sampled state rows.
    neighbour_rows : ndarray of int64 (S,)
        Row of the nearest sampled state of another episode (-1 when there is none).
    euclidean : ndarray of float64 (S,)
        Its euclidean distance in goal space (NaN when none).
    distance : ndarray of float64 (S,)
        Its distance under the reward rule (NaN when none).
    """

    rows: np.ndarray
    neighbour_rows: np.ndarray
    euclidean: np.ndarray
    distance: np.ndarray


def other_episode_distances(episodes: EpisodeSet, goal_map, rule, *, sample: int = 2000,
                            seed: int = 0, goals=None, mask=None) -> OtherEpisodeDistances:
    """Distance from sampled states to the nearest sampled state of a different episode.

    Uses an exact faiss ``IndexFlatL2`` over the sample, asking for ``k`` neighbours and
    doubling ``k`` for the states whose ``k`` nearest are all from their own episode. With
    ``mask`` (the :func:`state_masks`), each sampled state looks for its nearest in the
    dimensions of its own mask only (one index per distinct mask, the others set to 0), and
    both distances count those dimensions only.
    """
    import faiss

    g = state_goals(episodes, goal_map) if goals is None else goals
    rows = sample_states(episodes, sample, seed)
    pos, _, _ = _state_index(episodes)
    ep = pos[rows]
    x = np.ascontiguousarray(g[rows], dtype=np.float32)
    n = rows.size
    nb = np.full(n, -1, dtype=np.int64)
    m = _rows(mask, rows)
    if m is None:
        groups = [(x, np.arange(n))]
    else:  # one search space per distinct mask (a handful: one per task of the table)
        kinds, which = np.unique(m, axis=0, return_inverse=True)
        groups = [(np.ascontiguousarray(x * kinds[i].astype(np.float32)), np.flatnonzero(which.reshape(-1) == i))
                  for i in range(len(kinds))]
    for xs, todo in groups:  # a loop over distinct masks
        index = faiss.IndexFlatL2(xs.shape[1])
        index.add(xs)
        k = min(16, n)
        while todo.size and k > 0:  # a loop over doubling rounds
            _, found = index.search(xs[todo], k)
            other = (found >= 0) & (ep[np.maximum(found, 0)] != ep[todo][:, None])
            hit = other.any(axis=1)
            first = np.argmax(other, axis=1)
            nb[todo[hit]] = found[hit, first[hit]]
            todo = todo[~hit]
            if k >= n:
                break
            k = min(2 * k, n)
    has = nb >= 0
    nrows = np.where(has, rows[np.maximum(nb, 0)], -1)
    a, b = g[rows], g[rows[np.maximum(nb, 0)]]
    diff2 = (a - b) ** 2 if m is None else (a - b) ** 2 * m  # x * 1 == x: a full mask changes no bit
    euc = np.where(has, np.sqrt(np.sum(diff2, axis=1)), np.nan)
    dist = np.where(has, rule.distance(a, b, m), np.nan)
    return OtherEpisodeDistances(rows, nrows, euc, dist)


@dataclass(frozen=True)
class RewardedFraction:
    """Fraction of goal rows rewarded, per strategy, as a function of the threshold.

    Attributes
    ----------
    strategies : ndarray of int64 (S,)
        Strategy codes present, ascending.
    thresholds : ndarray of float64 (K,)
    fraction : ndarray of float64 (S, K)
    counts : ndarray of int64 (S,)
        Goal rows per strategy.
    """

    strategies: np.ndarray
    thresholds: np.ndarray
    fraction: np.ndarray
    counts: np.ndarray

    def as_dict(self) -> dict:
        """JSON-able form."""
        return {"strategies": self.strategies.tolist(), "thresholds": self.thresholds.tolist(),
                "fraction": self.fraction.tolist(), "counts": self.counts.tolist()}


def rewarded_fraction(achieved, goal, strategy, rule, thresholds, mask=None, distances=None) -> RewardedFraction:
    """Fraction of goal rows with ``d <= thr`` (``<`` for an exclusive rule), per strategy.

    Parameters
    ----------
    achieved, goal : array_like (M, G)
        Reached goal ``phi(s_{t+1})`` and assigned goal of each goal row.
    strategy : array_like of int (M,)
        Strategy code of each row (see :mod:`goalkit.relabel`).
    rule : RewardRule
        Gives the distance and the inclusiveness.
    thresholds : array_like of float (K,)
        Thresholds to evaluate (for ``box``: scales of the current tolerances).
    mask : array_like of uint8 (M, G), optional
        Each row's ``goal_mask``: only those dimensions count (None: every one).
    distances : ndarray of float64 (M,), optional
        ``rule.distance(achieved, goal, mask)`` when already computed (not computed again).

    Examples
    --------
    >>> from goalkit.reward import RewardRule
    >>> a = np.array([[0.0], [1.0], [2.0], [0.5]])
    >>> f = rewarded_fraction(a, np.zeros_like(a), [2, 2, 2, 0], RewardRule("l1", 1.0), [0.5, 1.0])
    >>> f.strategies.tolist(), f.fraction.tolist()
    ([0, 2], [[1.0, 1.0], [0.3333333333333333, 0.6666666666666666]])
    """
    s = np.asarray(strategy).astype(np.int64)
    rule.check_dim(np.shape(achieved)[-1])
    d = rule.distance(achieved, goal, mask) if distances is None else np.asarray(distances, dtype=np.float64)
    if s.shape != d.shape:
        raise TuningError(f"expected one strategy code per goal row ({d.shape[0]}), got shape {s.shape}",
                          key="strategy")
    t = np.asarray(thresholds, dtype=np.float64)
    if s.size and s.min() >= 0 and s.max() < 65536:  # strategy codes: small, so counted, not sorted
        present = np.bincount(s)
        codes = np.flatnonzero(present)
        inv = np.zeros(present.size, np.int64)
        inv[codes] = np.arange(codes.size)
        inv = inv[s]
    else:
        codes, inv = np.unique(s, return_inverse=True)
        inv = inv.reshape(-1)
    counts = np.bincount(inv, minlength=codes.size)
    # no sort of the rows: each row falls before a position of the sorted thresholds, and is
    # within every threshold from there on (d <= t: the first t >= d; d < t: the first t > d)
    t_order = np.argsort(t, kind="stable")
    pos = np.searchsorted(t[t_order], d, side="left" if rule.inclusive else "right")
    width = t.size + 1
    hist = np.bincount(inv * width + pos, minlength=codes.size * width).reshape(codes.size, width)
    frac = np.empty((codes.size, t.size))
    frac[:, t_order] = np.cumsum(hist, axis=1)[:, :t.size] / counts[:, None]
    return RewardedFraction(codes.astype(np.int64), t, frac, counts.astype(np.int64))


def summarise(values, quantiles=QUANTILES) -> dict:
    """Quantiles and mean of finite ``values``, JSON-able (``{"n": 0}`` when none)."""
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {"n": 0}
    q = _check_quantiles(quantiles)
    return {"n": int(v.size), "mean": float(v.mean()),
            "quantiles": dict(zip((f"{x:g}" for x in q), np.quantile(v, q, method="linear").tolist()))}


@dataclass(frozen=True)
class Diagnostics:
    """All label-free diagnostics of one set of episodes (see :func:`diagnose`)."""

    step: np.ndarray
    horizon: HorizonProfile
    other: OtherEpisodeDistances
    threshold: float

    def summary(self) -> dict:
        """JSON-able summary, including where the current threshold falls."""
        step = self.step[np.isfinite(self.step)]
        oth = self.other.distance[np.isfinite(self.other.distance)]
        return {
            "threshold": self.threshold,
            "step_displacement": summarise(self.step, self.horizon.quantiles),
            "horizon_displacement": self.horizon.as_dict(),
            "other_episode_distance": summarise(self.other.distance, self.horizon.quantiles),
            "fraction_steps_within_threshold": float(np.mean(step <= self.threshold)) if step.size else None,
            "fraction_other_episode_within_threshold": float(np.mean(oth <= self.threshold)) if oth.size else None,
        }


def diagnose(episodes: EpisodeSet, goal_map, rule, *, horizons=HORIZONS, quantiles=QUANTILES,
             sample: int = 2000, seed: int = 0, masks=None) -> Diagnostics:
    """Run every label-free diagnostic on ``episodes`` (goal vectors computed once).

    ``episodes`` is held in memory whole: pass a chunk or a sample of episodes of a large log.
    With ``masks`` (:class:`goalkit.masks.GoalMasks`), only the dimensions of each state's
    episode task mask count (module docstring); a full mask gives the same numbers as None.

    Raises
    ------
    ParameterError
        If the rule's tolerances or weights do not match the goal map's dimension.
    """
    rule.check_dim(goal_map.dim)
    g = state_goals(episodes, goal_map)
    m = state_masks(episodes, masks)
    thr = 1.0 if rule.distance_name == "box" else float(rule.threshold)
    return Diagnostics(
        step=step_displacement(episodes, goal_map, rule, goals=g, mask=m),
        horizon=horizon_displacement(episodes, goal_map, rule, horizons, quantiles, goals=g, mask=m),
        other=other_episode_distances(episodes, goal_map, rule, sample=sample, seed=seed, goals=g, mask=m),
        threshold=thr)


def threshold_warnings(summary: dict, *, low_quantile: str = "0.05", high_fraction: float = 0.5) -> list[str]:
    """Plain-language warnings about a threshold, from :meth:`Diagnostics.summary`.

    Two heuristics of ours (not published rules):

    * the threshold is below the ``low_quantile`` of the one-step displacement: nearly every
      step moves farther than the threshold, so only goals hit (almost) exactly are reached;
    * more than ``high_fraction`` of the sampled states have a state of *another* episode
      within the threshold: goals borrowed from other episodes are often reached for free.

    Returns
    -------
    list of str
        Empty when neither applies (or the summary lacks the numbers).
    """
    out = []
    thr = summary.get("threshold")
    step_q = summary.get("step_displacement", {}).get("quantiles", {})
    if thr is not None and low_quantile in step_q and thr < step_q[low_quantile]:
        out.append(f"threshold {thr:.4g} is below the {float(low_quantile):.0%} quantile of the one-step "
                   f"goal change ({step_q[low_quantile]:.4g}): goals count as reached only when hit "
                   f"almost exactly")
    frac = summary.get("fraction_other_episode_within_threshold")
    if thr is not None and frac is not None and frac > high_fraction:
        out.append(f"{frac:.0%} of sampled states have a state of another episode within threshold "
                   f"{thr:.4g}: goals from other episodes are often reached without effort")
    return out
