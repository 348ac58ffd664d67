"""Strategies that look beyond the episode: ``neighbour`` (6), ``library`` (7), ``near_miss`` (8).

For transition ``t`` of episode ``e`` (``T`` transitions):

``neighbour``
    ``j`` uniform on ``{t+1, ..., T}`` (stream "goal"): the *join state* ``s_j``. Among the ``k``
    nearest states of other episodes of the same split to ``s_j`` (``[relabel] neighbours``,
    :class:`~goalkit.relabel.search.GoalSearch`), one ``(e', i)`` uniformly (stream
    "neighbour"); the goal is ``s_m`` of ``e'`` with ``m`` uniform on ``{i, ..., T'}`` (stream
    "hop"; ``m = i``, the neighbour itself, is allowed). Row: ``hop_episode = goal_episode = e'``,
    ``hop_step = i``, ``join_step = j``, ``steps_to_goal = -1`` (the path joins two logs).
    Guarded (``[graph] guard_neighbours``, ``context.graph`` set): a goal the logs' graph does not
    connect to ``s_t+1`` within its horizon is dropped and the slot falls back to its join state
    ``s_j`` (a future goal: ``hop = -1``, ``steps_to_goal = j - t``), as ``near_miss`` does.
``library``
    Among the pairs (step ``j > t`` of ``e``, target ``l``) where ``s_j`` is within the threshold
    of target ``l``, one uniformly (stream "neighbour"); the goal is target ``l`` (external),
    ``join_step = j``, ``steps_to_goal = j - t``. When no target is matched after ``t`` in the
    episode: a target uniform over the library (stream "neighbour"), ``join_step = -1``,
    ``steps_to_goal = -1`` (unmatched).
``near_miss``
    ``j`` as for ``neighbour``; among the ``k`` states of other episodes of the same split
    nearest to ``s_j`` under the rule *whose distance to phi(s_j) is beyond the threshold*, one
    uniformly (stream "neighbour"); the goal is that state ``(e', i)``: ``goal = hop``,
    ``join_step = j``. When no state of the split is beyond the threshold of ``s_j`` (a
    threshold wider than the logs) the slot falls back to ``s_j`` itself (a future goal,
    ``hop = -1``, ``steps_to_goal = j - t``).
"""

from __future__ import annotations

import numpy as np

from goalkit import rng
from goalkit.relabel.strategies import StrategyGoals, _slots, locate, register


def _join_steps(seed, eid, t, length, slots) -> np.ndarray:
    return rng.integers(seed, t + 1, length + 1, eid, t, slots, "goal")


def _search(context, name):
    if context is None or context.neighbours is None:
        raise ValueError(f"{name} needs a RelabelContext with a goal search (goalkit.relabel.search)")
    return context.neighbours


def _hops(kind, chunk, transitions, slots, seed, context):
    """Join step, candidate count and chosen candidate of each row (loop over episodes)."""
    slots = _slots(slots, transitions)
    search = _search(context, kind)
    _, eid, t, length = locate(chunk, transitions)
    m = len(t)
    j = np.full(m, -1, np.int64)
    hop_ep = np.full(m, -1, np.int64)
    hop_step = np.full(m, -1, np.int64)
    if m == 0:
        return eid, t, slots, j, hop_ep, hop_step
    j = _join_steps(seed, eid, t, length, slots)
    order = np.argsort(eid, kind="stable")
    uniq, start = np.unique(eid[order], return_index=True)
    stop = np.append(start[1:], len(order))
    for e, a, b in zip(uniq.tolist(), start.tolist(), stop.tolist()):  # loop over episodes
        rows = order[a:b]
        eps, steps, cnt = search.candidates(kind, e)
        c = cnt[j[rows]]
        has = c > 0
        if not has.any():
            continue
        r = rows[has]
        pick = rng.integers(seed, 0, c[has], eid[r], t[r], slots[r], "neighbour")
        hop_ep[r] = eps[j[r], pick]
        hop_step[r] = steps[j[r], pick]
    return eid, t, slots, j, hop_ep, hop_step


def neighbour(chunk, transitions, slots, seed: int, context=None) -> StrategyGoals:
    """A later state of another episode, joined through a neighbour of a later own state.

    See the module docstring for the draws. Needs ``context.neighbours`` (a
    :class:`~goalkit.relabel.search.GoalSearch`).
    """
    eid, t, slots, j, hop_ep, hop_step = _hops("neighbour", chunk, transitions, slots, seed, context)
    if len(t) == 0:
        return StrategyGoals(hop_ep, hop_step, hop_episode=hop_ep, hop_step=hop_step, join_step=j)
    if (hop_ep < 0).any():
        raise ValueError("a join state has no neighbour in another episode of its split")
    hop_len = context.neighbours.lengths_of(hop_ep)
    m = rng.integers(seed, hop_step, hop_len + 1, eid, t, slots, "hop")
    graph = getattr(context, "graph", None)
    if graph is None:
        return StrategyGoals(hop_ep.copy(), m, hop_episode=hop_ep, hop_step=hop_step, join_step=j,
                             steps_to_goal=np.full(len(t), -1, np.int64))
    # the guard: keep the goal only when the logs' graph connects s_t+1 to it within the horizon
    kept = graph.distances(graph.node_of(eid, t + 1), graph.node_of(hop_ep, m)) >= 0
    return StrategyGoals(np.where(kept, hop_ep, eid), np.where(kept, m, j),
                         hop_episode=np.where(kept, hop_ep, -1), hop_step=np.where(kept, hop_step, -1),
                         join_step=j, steps_to_goal=np.where(kept, -1, j - t).astype(np.int64))


def near_miss(chunk, transitions, slots, seed: int, context=None) -> StrategyGoals:
    """A state of another episode near a later own state but beyond the threshold (a hard negative)."""
    eid, t, slots, j, hop_ep, hop_step = _hops("near_miss", chunk, transitions, slots, seed, context)
    found = hop_ep >= 0
    goal_ep = np.where(found, hop_ep, eid)
    goal_step = np.where(found, hop_step, j)
    steps = np.where(found, -1, j - t).astype(np.int64)
    return StrategyGoals(goal_ep, goal_step, hop_episode=hop_ep, hop_step=hop_step, join_step=j,
                         steps_to_goal=steps)


def library(chunk, transitions, slots, seed: int, context=None) -> StrategyGoals:
    """A library target the episode reaches after ``t`` (or, if none, any target, unmatched)."""
    slots = _slots(slots, transitions)
    if context is None or context.library is None:
        raise ValueError("library needs a RelabelContext with a goal library (goalkit.relabel.library)")
    lib = context.library
    _, eid, t, _ = locate(chunk, transitions)
    m = len(t)
    minus = np.full(m, -1, np.int64)
    if m == 0:
        return StrategyGoals(minus, minus.copy(), np.zeros((0, lib.dim)), join_step=minus.copy(),
                             steps_to_goal=minus.copy())
    first, count = lib.later_matches(eid, t)
    matched = count > 0
    # one draw per row: a match index among the later matches, or (unmatched) a target index
    k = rng.integers(seed, 0, np.where(matched, count, len(lib.targets)), eid, t, slots, "neighbour")
    target = k.copy()
    j = minus.copy()
    idx = first[matched] + k[matched]
    target[matched] = lib.match_target[idx]
    j[matched] = lib.match_step[idx]
    steps = np.where(matched, j - t, -1).astype(np.int64)
    return StrategyGoals(minus, minus.copy(), lib.targets[target], join_step=j, steps_to_goal=steps)


def _library_dim(chunk, context) -> int:
    if context is None or context.library is None:
        raise ValueError("library needs a RelabelContext with a goal library")
    return context.library.dim


# ---- their entries in the strategy table ------------------------------------------------
register("neighbour", neighbour, 6, join="later", hops=True, goal_table=True, rules=[
    ("a neighbour goal must be a state s_m of the hop episode with hop step <= m <= its length, the hop "
     "episode another episode than the source (guarded and dropped: its join state s_j)",
     lambda r: np.where(r.he >= 0, (r.he != r.ep) & (r.ge == r.he) & (r.hs >= 0) & (r.j >= r.hs) & (r.j <= r.goal_T),
                        r.same & (r.j == r.join) & (r.hs == -1)))])
register("library", library, 7, external_dim=_library_dim, join="later_or_none", steps_from_join=True,
         goal_table=True, rules=[
    ("a library goal must be external, joined at a later step (t < join_step <= T) or unmatched (-1)",
     lambda r: (r.ge == -1) & (r.j == -1) & (r.he == -1) & (r.hs == -1) & (r.later_join | (r.join == -1)))])
register("near_miss", near_miss, 8, join="later", hops=True, goal_table=True, rules=[
    ("a near-miss goal must be the hop state, in another episode (0 <= step <= its length)",
     lambda r: (r.he < 0) | ((r.ge == r.he) & (r.j == r.hs) & (r.he != r.ep) & (r.hs >= 0) & (r.hs <= r.hop_T))),
    ("a near-miss goal without a hop state must be its join state s_j of the source episode",
     lambda r: (r.he >= 0) | (r.same & (r.j == r.join) & (r.hs == -1)))])
