"""Fixtures for build tests: small invented episode sets (unit-test data only)."""

import numpy as np

from goalkit.logs.episodes import EpisodeSet


def make_episodes(n_episodes=60, seed=0, low=3, high=40, obs_dim=6, task_goals=True) -> EpisodeSet:
    rs = np.random.default_rng(seed)
    lengths = rs.integers(low, high, size=n_episodes)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    n, e = int(offsets[-1]), n_episodes
    obs = np.cumsum(rs.normal(scale=0.05, size=(n + e, obs_dim)), axis=0).astype(np.float32)
    return EpisodeSet(
        observations=obs,
        actions=rs.normal(size=(n, 2)).astype(np.float32),
        offsets=offsets,
        episode_ids=np.arange(e, dtype=np.int64),
        rewards=rs.integers(0, 2, size=n).astype(np.float32),
        task_goals=rs.normal(size=(n, 3)) if task_goals else None,
        fields={"head": (0, 3), "velocity": (3, obs_dim)},
        source="<test episodes>",
    )


RECIPE = """
seed = {seed}
[logs]
path = "unused-memory-logs"
[goal]
fields = ["head"]
[relabel]
goals_per_transition = {gpt}
[relabel.weights]
{weights}
[reward]
threshold = {threshold}
{reward_extra}
[split]
validation = {validation}
[output]
path = "{out}"
chunk_rows = {chunk_rows}
mode = "{mode}"
compression = "{compression}"
"""


def recipe_text(out, seed=1, gpt=5, weights="original = 1\nfuture = 4", threshold=0.05,
                validation=0.2, chunk_rows=512, mode="materialised", reward_extra="", compression="gzip"):
    return RECIPE.format(out=out, seed=seed, gpt=gpt, weights=weights, threshold=threshold,
                         validation=validation, chunk_rows=chunk_rows, mode=mode, reward_extra=reward_extra,
                         compression=compression)


