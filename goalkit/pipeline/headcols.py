"""Goal heads in a built set: one column group per head for every transition row.

With ``[output] goals = "heads"`` a set has one row per transition and, for each of the
recipe's ``[heads.NAME]`` tables (:class:`goalkit.heads.GoalHead`), the columns
``FIELD@NAME`` of :data:`goalkit.rows.HEAD_FIELDS`. A head's goal follows the same laws as the
training sampler's heads (:mod:`goalkit.write.headsampler`), but every draw is addressed like
the rest of a build: the source of head ``h`` (its position among the recipe's heads) for the
transition ``(episode id e, step t)`` is ``uniform(seed, e, t, h, "head_source")`` and its goal
position ``uniform(seed, e, t, h, "head_goal")`` (:mod:`goalkit.rng`), so the columns do not depend
on chunking, workers or the runner. For transition ``t`` of an episode of ``T`` transitions and
one uniform ``u`` (the ``head_goal`` draw):

* ``current``: ``j = t``; ``final``: ``j = T``; ``subgoal``: ``j = min(t + k, T)``;
* ``future``: ``j = t + 1 + floor(u (T - t))``; ``episode``: ``j = floor(u (T + 1))``;
* ``geometric``: ``j = t + min(max(ceil(log(1 - q) / log(gamma)), 1), T - t)`` with ``q = u``
  (``clip``) or ``q = u (1 - gamma**(T - t))`` (``renormalise``);
* ``random``: state ``floor(u S)`` of the split's ``S`` states, counted episode by episode in
  episode-id order (``s_0 .. s_T'`` of each).

In-batch negatives are refused in a build (:func:`goalkit.heads.check_fixed_heads`).
"""

from __future__ import annotations

import numpy as np

from goalkit import rng
from goalkit.heads import SOURCE_CODES
from goalkit.pipeline.labels import row_labels
from goalkit.reward import score
from goalkit.rows import HEAD_FIELDS, HEAD_MASK_FIELD, head_column

_CUR, _FUT, _GEO, _RND, _FIN, _EPI, _SUB = (SOURCE_CODES[n] for n in (
    "current", "future", "geometric", "random", "final", "episode", "subgoal"))
#: Goal-mask slot of head ``h``: ``HEAD_MASK_SLOT + h`` (past every relabelling slot).
HEAD_MASK_SLOT = 1 << 16


def head_columns_spec(heads, goal_dtype, goal_dim: int, masks: bool) -> dict:
    """Column name -> (dtype, per-row shape) of every head column, in the order they are written."""
    out = {}
    kinds = {"": (), "goal": (goal_dim,)}
    for head in heads:
        for f in HEAD_FIELDS.values():
            dtype = np.dtype(goal_dtype) if f.dtype == "goal" else np.dtype(f.dtype)
            out[head_column(f.name, head.name)] = (dtype, kinds[f.kind])
        if masks:
            out[head_column(HEAD_MASK_FIELD.name, head.name)] = (np.dtype(HEAD_MASK_FIELD.dtype), (goal_dim,))
    return out


def needs_goal_table(heads) -> bool:
    """True when a head draws random states (goals from other episodes)."""
    return any(h.weights.get("random", 0) > 0 for h in heads)


def choose_sources(heads, u) -> np.ndarray:
    """Source code (uint8, shape of ``u``) of each head's goal from uniforms ``u`` (heads, M)."""
    out = np.empty(u.shape, np.uint8)
    for h, head in enumerate(heads):
        probs = head.probabilities()
        codes = np.array([SOURCE_CODES[s] for s in probs], dtype=np.uint8)
        cum = np.cumsum(list(probs.values()))
        cum[-1] = np.inf   # rounding never runs past the last source of positive weight
        out[h] = codes[np.searchsorted(cum, u[h], side="right")]
    return out


def goal_steps(heads, src, u, t, T) -> np.ndarray:
    """Goal step ``j`` within the own episode, int64 (heads, M), for the same-episode sources."""
    gamma = np.array([h.gamma for h in heads], dtype=np.float64)[:, None]
    renorm = np.array([h.past_end == "renormalise" for h in heads])[:, None]
    k_sub = np.array([h.steps for h in heads], dtype=np.int64)[:, None]
    room = T - t
    j = np.broadcast_to(t, src.shape).copy()                                   # current
    j = np.where(src == _FUT, np.minimum(t + 1 + (u * room).astype(np.int64), T), j)
    q = np.where(renorm, u * -np.expm1(room * np.log(gamma)), u)
    with np.errstate(divide="ignore"):
        k = np.ceil(np.log1p(-q) / np.log(gamma))
    j = np.where(src == _GEO, t + np.minimum(np.maximum(k, 1.0), room).astype(np.int64), j)
    j = np.where(src == _FIN, T, j)
    j = np.where(src == _EPI, np.minimum((u * (T + 1)).astype(np.int64), T), j)
    j = np.where(src == _SUB, np.minimum(t + k_sub, T), j)
    return j


def random_states(ids, lengths, u) -> tuple[np.ndarray, np.ndarray]:
    """(episode id, step) of state ``floor(u S)`` of a split's ``S`` states (episodes in id order)."""
    ends = np.cumsum(np.asarray(lengths, dtype=np.int64) + 1)
    r = np.minimum((u * ends[-1]).astype(np.int64), ends[-1] - 1)
    idx = np.searchsorted(ends, r, side="right")
    return np.asarray(ids, dtype=np.int64)[idx], r - (ends[idx] - np.asarray(lengths)[idx] - 1)


def head_rows(plan, chunk, phi_chunk, split_code: int, src_pos, src_ep, t, achieved, tasks=None) -> dict:
    """Every head column of the rows ``(src_pos, t)`` of one split of a chunk.

    Parameters
    ----------
    plan : BuildPlan
    chunk : EpisodeSet
    phi_chunk : ndarray
        phi of the chunk's states, in the goal dtype.
    split_code : int
        The split of every row.
    src_pos, src_ep, t : ndarray of int64 (M,)
        Episode position in the chunk, episode id and step of each row's transition.
    achieved : ndarray (M, G)
        phi(s_t+1) of each row.
    tasks : ndarray of int64 (M,), optional
        Task id of each row's episode (goal masks).

    Returns
    -------
    dict
        ``FIELD@NAME`` -> column, in the order of :func:`head_columns_spec`.
    """
    recipe = plan.recipe
    heads = recipe.heads
    nh, m = len(heads), len(t)
    slot = np.arange(nh, dtype=np.int64)[:, None]
    u_src = rng.uniform(recipe.seed, src_ep[None, :], t[None, :], slot, "head_source")
    u_goal = rng.uniform(recipe.seed, src_ep[None, :], t[None, :], slot, "head_goal")
    T = chunk.lengths[src_pos]
    src = choose_sources(heads, u_src)
    j = goal_steps(heads, src, u_goal, t, T)
    gep = np.broadcast_to(src_ep, src.shape).copy()
    rnd = src == _RND
    goal = np.take(phi_chunk, chunk.state_row(np.broadcast_to(src_pos, src.shape), j), axis=0)
    if rnd.any():
        ids = plan.context.split_episode_ids[split_code]
        lengths = plan.context.split_lengths[split_code]
        re, rj = random_states(ids, lengths, u_goal[rnd])
        gep[rnd], j[rnd] = re, rj
        goal[rnd] = plan.goal_table[plan.global_state_rows(re, rj)]
    steps = np.where((gep == src_ep) & (j >= t), j - t, -1)
    mask = None
    if plan.masks is not None:
        tasks = np.full(m, -1, np.int64) if tasks is None else tasks
        mask = np.stack([plan.masks.row_masks(recipe.seed, src_ep, t, np.full(m, HEAD_MASK_SLOT + h),
                                              np.ones(m, np.int64), tasks) for h in range(nh)])
    out = {}
    for h, head in enumerate(heads):
        sc = score(recipe.reward, achieved, goal[h], None if mask is None else mask[h]).columns()
        labels = row_labels(steps[h], head.gamma, sc["terminal"])
        cols = {"source": src[h], "goal_episode": gep[h], "goal_step": j[h], "steps_to_goal": steps[h],
                "goal": goal[h], **sc, **labels}
        for name in HEAD_FIELDS:
            out[head_column(name, head.name)] = cols[name]
        if mask is not None:
            out[head_column(HEAD_MASK_FIELD.name, head.name)] = mask[h]
    return out
