"""The chunk task: one chunk of episodes in, goal-conditioned rows out (pure, vectorised)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from goalkit.goals.stategraph import graph_steps
from goalkit.pipeline.casts import cast_problem, first_row
from goalkit.pipeline.headcols import head_rows
from goalkit.pipeline.labels import row_labels
from goalkit.pipeline.plan import SLOT_SPAN
from goalkit.relabel.strategies import STRATEGIES
from goalkit.reward import score
from goalkit.rows import END_FLAG_SOURCES, GOAL_ADDRESS, SPLITS
from goalkit.write.gather import RowGather


@dataclass(frozen=True)
class ChunkRows:
    """Rows produced from one chunk, per split: ``columns[split]`` and ``keys[split]``."""

    columns: dict
    keys: dict


def goal_vectors(plan, chunk, phi_chunk, rows, src_pos, src_ep) -> np.ndarray:
    """Goal vector of every goal row, of shape (M, G) and the dtype of ``phi_chunk``.

    Same-episode goals are read from ``phi_chunk`` (phi of the chunk's states), goals of other
    episodes from the plan's goal table, external goals from ``rows.external``.
    """
    m = len(rows.goal_episode)
    same = rows.goal_episode == src_ep
    if same.all():  # the common case (final, future, episode, geometric): one gather
        return np.take(phi_chunk, chunk.state_row(src_pos, rows.goal_step), axis=0)
    out = np.empty((m, plan.goal_map.dim), dtype=phi_chunk.dtype)
    if same.any():
        srow = chunk.state_row(src_pos[same], rows.goal_step[same])
        out[same] = phi_chunk[srow]
    ext = rows.goal_episode < 0
    if ext.any():
        values = rows.external[ext]
        _, bad = cast_problem(values, out.dtype)
        if bad is not None and plan.dtypes is not None:   # a task or library goal beyond the goal dtype
            i = first_row(bad)
            where = np.flatnonzero(ext)[i]
            pos = int(src_pos[where])
            step = int(rows.transition[where] - chunk.offsets[pos])
            original = int(rows.strategy[where]) == STRATEGIES["original"].code
            plan.dtypes.refuse(values, bad, i, int(src_ep[where]), step, "task_goal" if original else "goal",
                               "goal.dtype")
        out[ext] = values
    cross = ~same & ~ext
    if cross.any():
        g = plan.global_state_rows(rows.goal_episode[cross], rows.goal_step[cross])
        out[cross] = plan.goal_table[g]
    return out


def transition_columns(plan, episodes, transitions, positions) -> dict:
    """The optional per-transition columns a set built from ``plan`` stores, for some transitions.

    ``termination`` and ``time_limit`` (the log's end flags, uint8), ``source`` (the log source,
    uint16) and ``task_reward`` (float32), each only when the plan's columns have it, as the
    build writes them (:func:`relabel_chunk` calls it; so do the training samplers).

    Parameters
    ----------
    plan : BuildPlan
    episodes : EpisodeSet
    transitions, positions : ndarray of int
        Transition indices into ``episodes`` and their episodes' positions.
    """
    out = {}
    if "task_reward" in plan.columns:
        out["task_reward"] = np.take(episodes.rewards, transitions, axis=0).astype(np.float32)
    for name, attr in END_FLAG_SOURCES.items():
        if name in plan.columns:
            out[name] = np.take(getattr(episodes, attr), transitions, axis=0).astype(np.uint8)
    if "source" in plan.columns:
        out["source"] = np.take(episodes.sources, positions, axis=0).astype(np.uint16)
    return out


def relabel_chunk(plan, chunk, defer_gathers: bool = False) -> ChunkRows:
    """Relabel one chunk of episodes and score every row.

    Parameters
    ----------
    plan : BuildPlan
    chunk : EpisodeSet
        Consecutive kept episodes.
    defer_gathers : bool
        Give the observation, next_observation and action columns as
        :class:`~goalkit.write.gather.RowGather` (rows of the chunk's arrays, copied when
        written) instead of arrays. The written bytes are the same.

    Returns
    -------
    ChunkRows
        Columns and row keys for each split present in the chunk, rows in
        (source_episode, source_step, slot) order.
    """
    gdtype = np.dtype(plan.recipe.goal.dtype)
    # the chunk's episodes are consecutive kept episodes: their positions follow from the first
    first = int(plan.positions(chunk.episode_ids[:1])[0])
    if not np.array_equal(plan.episode_ids[first:first + chunk.num_episodes], chunk.episode_ids):
        raise ValueError("relabel_chunk needs consecutive kept episodes of the plan")
    # phi of every state of the chunk once, in the stored precision, so that rewards recompute
    # exactly from the stored goal vectors (distances are computed in float64 from these).
    phi = np.asarray(plan.goal_map(chunk, np.arange(chunk.observations.shape[0])))
    stored = stored_arrays(plan, chunk) if "observation" in plan.columns else None
    phi_chunk = phi.astype(gdtype) if plan.dtypes is None else plan.dtypes.cast(phi, "goal", "goal.dtype", chunk,
                                                                                  state_level=True)
    episode_split = plan.splits[first:first + chunk.num_episodes]
    out_cols, out_keys = {}, {}
    for code, name in enumerate(SPLITS):
        members = episode_split == code
        if not members.any():
            continue
        if members.all():
            transitions = None  # every transition of the chunk
        else:  # the split's transitions, in order: rows come out per split, with no masking after
            transitions = np.flatnonzero(np.repeat(members, chunk.lengths))
        cols, keys = _split_rows(plan, chunk, phi_chunk, first, transitions, gdtype, defer_gathers, stored)
        if len(keys) or plan.goals is None:   # a split of sources with 0 goal rows yields no rows
            out_cols[name], out_keys[name] = cols, keys
    return ChunkRows(out_cols, out_keys)


def stored_arrays(plan, chunk) -> tuple:
    """The chunk's observations and actions in the stored dtypes (checked casts, once per chunk)."""
    if plan.dtypes is None:
        return chunk.observations, chunk.actions
    return (plan.dtypes.cast(chunk.observations, "observation", "output.observation_dtype", chunk, state_level=True),
            plan.dtypes.cast(chunk.actions, "action", "output.action_dtype", chunk, state_level=False))


def _split_rows(plan, chunk, phi_chunk, first, transitions, gdtype, defer_gathers, stored=None):
    """Columns and keys of the rows of ``transitions`` (chunk indices; None: all)."""
    rule = plan.recipe.reward
    slots = None
    if plan.goals is not None:   # per-source goal rows: each transition gets its source's count
        slots = np.repeat(plan.goals[first:first + chunk.num_episodes], chunk.lengths)
        slots = slots if transitions is None else slots[transitions]
    rows = plan.recipe.mixture.assign(chunk, plan.recipe.seed, plan.context, transitions=transitions, slots=slots)
    t = rows.transition
    src_pos = chunk.transition_episode()[t]
    src_ep = chunk.episode_ids[src_pos]
    src_step = t - chunk.offsets[src_pos]
    cur = t + src_pos
    achieved = np.take(phi_chunk, cur + 1, axis=0)
    goal = goal_vectors(plan, chunk, phi_chunk, rows, src_pos, src_ep)
    mask = None if plan.masks is None else row_masks(plan, chunk, src_pos, src_ep, src_step, rows)
    scores = score(rule, achieved, goal, mask).columns()
    keys = (plan.transition_offsets[first + src_pos] + src_step) * SLOT_SPAN + rows.slot
    # the columns in the order of the row schema (goalkit.rows.INDEX_FIELDS)
    cols = {"source_episode": src_ep, "source_step": src_step, "slot": rows.slot, "strategy": rows.strategy,
            **{name: getattr(rows, name) for name in GOAL_ADDRESS}, "goal": goal, **scores,
            **row_labels(rows.steps_to_goal, plan.recipe.mixture.gamma, scores["terminal"])}
    if "observation" in plan.columns:
        gather = RowGather if defer_gathers else (lambda a, i: np.take(a, i, axis=0))
        observations, actions = stored if stored is not None else (chunk.observations, chunk.actions)
        cols["observation"] = gather(observations, cur)
        cols["action"] = gather(actions, t)
        cols["next_observation"] = gather(observations, cur + 1)
        cols["reached_goal"] = achieved
    # task reward, the environment's end flags (same for every slot; never scored) and the source
    cols.update(transition_columns(plan, chunk, t, src_pos))
    if mask is not None:
        cols["goal_mask"] = mask
    if plan.recipe.output.goals == "heads":  # one column group per goal head (goalkit.pipeline.headcols)
        tasks = None if chunk.task_ids is None else np.take(chunk.task_ids, src_pos)
        code = int(plan.splits[first + src_pos[0]]) if len(src_pos) else 0
        cols.update(head_rows(plan, chunk, phi_chunk, code, src_pos, src_ep, src_step, achieved, tasks))
    if plan.graph is not None:  # graph distances (goalkit.goals.stategraph; issue 15)
        spec = plan.recipe.graph
        always = rows.strategy == STRATEGIES["neighbour"].code if spec.guard_neighbours else None
        cols["graph_steps"] = graph_steps(plan.graph, spec, plan.recipe.seed, rows.strategy, src_ep, src_step,
                                          rows.goal_episode, rows.goal_step, always=always)
    return cols, keys


def row_masks(plan, chunk, src_pos, src_ep, src_step, rows) -> np.ndarray:
    """The ``goal_mask`` column, uint8 (M, G), of goal rows (see :mod:`goalkit.masks`)."""
    tasks = (np.full(len(src_pos), -1, np.int64) if chunk.task_ids is None
             else np.take(chunk.task_ids, src_pos))
    return plan.masks.row_masks(plan.recipe.seed, src_ep, src_step, rows.slot, rows.strategy, tasks)
