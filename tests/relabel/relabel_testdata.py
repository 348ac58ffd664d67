"""Invented episode layouts for the relabelling tests (unit-test data only)."""

from __future__ import annotations

import numpy as np

from goalkit.logs.episodes import EpisodeSet


def make_set(lengths, first_id=0, goal_dim=3, with_task_goals=True, seed=0) -> EpisodeSet:
    """EpisodeSet with the given episode lengths; observation column 0 holds the step index.

    Columns: 0 = step t of the state, 1 = episode id, 2.. = invented nozzle-head positions.
    """
    lengths = np.asarray(lengths, dtype=np.int64)
    e = len(lengths)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    n = int(offsets[-1])
    ids = np.arange(first_id, first_id + e, dtype=np.int64)
    steps = np.concatenate([np.arange(t + 1) for t in lengths]) if e else np.zeros(0)
    owner = np.repeat(ids, lengths + 1)
    gen = np.random.default_rng(seed)  # test data only, not build randomness
    head = gen.uniform(0.0, 1.0, size=(n + e, goal_dim))
    obs = np.column_stack([steps, owner, head]).astype(np.float64)
    task_goals = gen.uniform(0.0, 1.0, size=(n, goal_dim)) if with_task_goals else None
    return EpisodeSet(observations=obs, actions=np.zeros((n, 2)), offsets=offsets,
                      episode_ids=ids, task_goals=task_goals, source="bench-log.h5")
