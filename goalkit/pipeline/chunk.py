"""The chunk task: one chunk of episodes in, goal-conditioned rows out (pure, vectorised)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from goalkit.pipeline.plan import SLOT_SPAN


@dataclass(frozen=True)
class ChunkRows:
    """Rows produced from one chunk, per split: ``columns[split]`` and ``keys[split]``."""

    columns: dict
    keys: dict


def goal_vectors(plan, chunk, phi_chunk, rows, src_pos, src_ep) -> np.ndarray:
    """Goal vector of every goal row, float64 of shape (M, G).

    Same-episode goals are read from ``phi_chunk`` (phi of the chunk's states), goals of other
    episodes from the plan's goal table, external goals from ``rows.external``.
    """
    m = len(rows.goal_episode)
    out = np.empty((m, plan.goal_map.dim), dtype=np.float64)
    same = rows.goal_episode == src_ep
    if same.any():
        srow = chunk.state_row(src_pos[same], rows.goal_step[same])
        out[same] = phi_chunk[srow]
    ext = rows.goal_episode < 0
    if ext.any():
        out[ext] = rows.external[ext]
    cross = ~same & ~ext
    if cross.any():
        g = plan.global_state_rows(rows.goal_episode[cross], rows.goal_step[cross])
        out[cross] = plan.goal_table[g]
    return out


def relabel_chunk(plan, chunk) -> ChunkRows:
    """Relabel one chunk of episodes and score every row.

    Parameters
    ----------
    plan : BuildPlan
    chunk : EpisodeSet
        Consecutive kept episodes.

    Returns
    -------
    ChunkRows
        Columns and row keys for each split present in the chunk, rows in
        (source_episode, source_step, slot) order.
    """
    recipe = plan.recipe
    rule = recipe.reward
    gdtype = np.dtype(recipe.goal.dtype)
    rows = recipe.mixture.assign(chunk, recipe.seed, plan.context)
    t = rows.transition
    ep_of_t = chunk.transition_episode()
    src_pos = ep_of_t[t]
    src_ep = chunk.episode_ids[src_pos]
    src_step = t - chunk.offsets[src_pos]
    # phi of every state of the chunk once; cast to the stored precision first, so that rewards
    # recompute exactly from the stored goal vectors.
    phi_chunk = plan.goal_map(chunk, np.arange(chunk.observations.shape[0])).astype(gdtype).astype(np.float64)
    next_rows = t + src_pos + 1
    achieved = phi_chunk[next_rows]
    goal = goal_vectors(plan, chunk, phi_chunk, rows, src_pos, src_ep).astype(gdtype).astype(np.float64)
    d = rule.distance(achieved, goal)
    reached = rule.reached_from(d)
    reward = rule.reward_from(d)
    terminal = reached if rule.end_on_reach else np.zeros_like(reached)
    gpos = plan.positions(src_ep)
    keys = (plan.transition_offsets[gpos] + src_step) * SLOT_SPAN + rows.slot
    scalars = {
        "source_episode": src_ep,
        "source_step": src_step,
        "slot": rows.slot,
        "strategy": rows.strategy,
        "goal_episode": rows.goal_episode,
        "goal_step": rows.goal_step,
        "hop_episode": rows.hop_episode,
        "hop_step": rows.hop_step,
        "join_step": rows.join_step,
        "steps_to_goal": rows.steps_to_goal,
        "goal": goal.astype(gdtype),
        "goal_distance": d.astype(np.float32),
        "reward": reward,
        "reached": reached.astype(np.uint8),
        "terminal": terminal.astype(np.uint8),
    }
    split = plan.splits[gpos]
    out_cols, out_keys = {}, {}
    for code, name in ((0, "train"), (1, "validation")):
        idx = np.flatnonzero(split == code)
        if idx.size == 0:
            continue
        whole = idx.size == split.size
        cols = {k: (v if whole else np.take(v, idx, axis=0)) for k, v in scalars.items()}
        ti, pi = (t, src_pos) if whole else (t[idx], src_pos[idx])
        if "observation" in plan.columns:
            cols["observation"] = np.take(chunk.observations, ti + pi, axis=0)
            cols["action"] = np.take(chunk.actions, ti, axis=0)
            cols["next_observation"] = np.take(chunk.observations, ti + pi + 1, axis=0)
            cols["reached_goal"] = np.take(phi_chunk, ti + pi + 1, axis=0).astype(gdtype)
        if "task_reward" in plan.columns:
            cols["task_reward"] = np.take(chunk.rewards, ti, axis=0).astype(np.float32)
        out_cols[name] = cols
        out_keys[name] = keys if whole else keys[idx]
    return ChunkRows(out_cols, out_keys)
