"""On-the-fly relabelling for training loops that want fresh goals every minibatch.

The sampler uses the recipe's own goal map, strategies and reward rule, so a batch is scored
exactly as a built set would be; only the goals differ from batch to batch. Batch ``b`` is a
pure function of (recipe seed, b), so a training run can be replayed.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from goalkit import rng
from goalkit.errors import RecipeError
from goalkit.goals.stategraph import graph_steps
from goalkit.logs.episodes import chunk_bounds, concat_episodes, consecutive_runs
from goalkit.pipeline.chunk import row_labels, transition_columns
from goalkit.pipeline.plan import make_plan
from goalkit.relabel.strategies import STRATEGIES
from goalkit.reward import score
from goalkit.rows import SPLIT_CODES, SPLITS


def load_split(recipe, split: str = "train", source=None):
    """Read one split of a recipe's logs into memory, with phi of every state.

    Parameters
    ----------
    recipe : Recipe
    split : {"train", "validation"}
    source : LogSource, optional
        Opened logs (default: the recipe's).

    Returns
    -------
    (plan, episodes, phi) : (BuildPlan, EpisodeSet, ndarray (N + E, G))
        The build plan, the split's episodes (read a chunk at a time; observations and actions
        in the stored dtypes a build would write) and the goal vector of every state, in the
        recipe's goal dtype.

    Raises
    ------
    RecipeError
        On an unknown split or a split without episodes.
    """
    if split not in SPLIT_CODES:
        raise RecipeError(f"unknown split {split!r}; splits are {', '.join(SPLITS)}", file=recipe.file)
    plan, source = make_plan(recipe, source)
    code = SPLIT_CODES[split]
    parts = []
    for a, b in chunk_bounds(plan.lengths, 500_000):
        chunk = source.read(a, b)
        keep = np.flatnonzero(plan.splits[a:b] == code)
        for lo, hi in consecutive_runs(keep):
            parts.append(chunk.select(int(keep[lo]), int(keep[hi - 1]) + 1))
    if not parts:
        raise RecipeError(f"the {split} split holds no episode", file=recipe.file, key="split.validation")
    episodes = concat_episodes(parts)
    phi = np.asarray(plan.goal_map(episodes, np.arange(episodes.observations.shape[0])))
    # the stored dtypes a build of the recipe would write (checked casts; phi from the logged values)
    phi = plan.dtypes.cast(phi, "goal", "goal.dtype", episodes, state_level=True)
    episodes = replace(episodes,
                       observations=plan.dtypes.cast(episodes.observations, "observation", "output.observation_dtype",
                                                     episodes, state_level=True),
                       actions=plan.dtypes.cast(episodes.actions, "action", "output.action_dtype", episodes,
                                                state_level=False))
    return plan, episodes, phi


class GoalSampler:
    """Draw minibatches of (transition, fresh goal) rows from one split of the logs.

    Parameters
    ----------
    recipe : Recipe
        Goal map, strategy weights, reward rule, split and seed come from it;
        ``goals_per_transition`` is ignored (one goal per sampled transition).
    split : {"train", "validation"}
        Which episodes to sample from.
    source : LogSource, optional
        Opened logs (default: the recipe's).

    Notes
    -----
    The split's episodes are held in memory (read a chunk at a time). For logs larger than
    memory, build an indexed set instead and stream it with the reader.

    Examples
    --------
    >>> sampler = GoalSampler(load_recipe("gantry-demo/gantry-recipe.toml"))   # doctest: +SKIP
    >>> batch = sampler.batch(256, index=0)                                       # doctest: +SKIP
    >>> batch["goal"].shape, batch["reward"].dtype                                # doctest: +SKIP
    ((256, 6), dtype('float32'))
    """

    def __init__(self, recipe, split: str = "train", source=None):
        self.recipe = recipe
        self.plan, self.episodes, self.phi = load_split(recipe, split, source)
        self.mixture = replace(recipe.mixture, goals_per_transition=1)
        # the episode of every transition, once (not rebuilt per batch)
        self._transition_episode = self.episodes.transition_episode()

    @property
    def num_transitions(self) -> int:
        """Transitions available to sample from."""
        return self.episodes.num_transitions

    def batch(self, batch_size: int, index: int) -> dict:
        """Return batch number ``index``: ``batch_size`` transitions, each with a fresh goal.

        Returns
        -------
        dict of ndarray
            observation, action, next_observation, reached_goal, goal, goal_distance, reward,
            reached, terminal, strategy, source_episode, source_step, goal_episode, goal_step,
            steps_to_goal, discount_weight, return_to_goal, bootstrap_mask (discount: the
            recipe's ``[relabel] gamma``); and, when a set built from the recipe would store
            them, ``task_reward``, ``termination``, ``time_limit``, ``source``, ``goal_mask`` and
            ``graph_steps`` (with the recipe's ``[graph]`` table).
        """
        eps, rule = self.episodes, self.recipe.reward
        seed = self.recipe.seed
        pick = rng.integers(seed, 0, eps.num_transitions, episode=np.full(batch_size, index),
                            step=np.arange(batch_size), stream="sampler")
        batch_seed = int(rng.hash64(seed, index, 0, 0, "sampler")[0] >> np.uint64(1))
        order = np.argsort(pick, kind="stable")
        rows = self.mixture.assign(eps, batch_seed, self.plan.context, transitions=pick[order])
        inv = np.empty_like(order)
        inv[order] = np.arange(batch_size)
        sel = inv  # row i of the output is sampled draw i
        t_idx = rows.transition[sel]
        pos = self._transition_episode[t_idx]
        step = t_idx - eps.offsets[pos]
        cur = t_idx + pos
        achieved = self.phi[cur + 1].astype(np.float64)
        ge, gs = rows.goal_episode[sel], rows.goal_step[sel]
        goal = np.empty_like(achieved)
        internal = ge >= 0
        if internal.any():
            goal[internal] = self.phi[eps.state_row(eps.position_of(ge[internal]), gs[internal])]
        if (~internal).any():
            goal[~internal] = rows.external[sel][~internal].astype(self.phi.dtype)
        mask = None  # goal masks of the recipe's [mask] table, drawn with the batch's seed
        if self.plan.masks is not None:
            tasks = np.full(batch_size, -1, np.int64) if eps.task_ids is None else eps.task_ids[pos]
            mask = self.plan.masks.row_masks(batch_seed, eps.episode_ids[pos], step, rows.slot[sel],
                                             rows.strategy[sel], tasks)
        scores = score(rule, achieved, goal, mask)
        src_ep = eps.episode_ids[pos]
        extra = transition_columns(self.plan, eps, t_idx, pos)
        if self.plan.graph is not None:  # as the build labels rows (goalkit.pipeline.chunk)
            spec = self.recipe.graph
            strategy = rows.strategy[sel]
            always = strategy == STRATEGIES["neighbour"].code if spec.guard_neighbours else None
            extra["graph_steps"] = graph_steps(self.plan.graph, spec, seed, strategy, src_ep, step, ge, gs,
                                               always=always)
        return {
            "observation": eps.observations[cur], "action": eps.actions[t_idx],
            "next_observation": eps.observations[cur + 1],
            "reached_goal": achieved.astype(self.phi.dtype), "goal": goal.astype(self.phi.dtype),
            **scores.columns(), **({} if mask is None else {"goal_mask": mask}),
            "strategy": rows.strategy[sel], "source_episode": src_ep, "source_step": step,
            "goal_episode": ge, "goal_step": gs, "steps_to_goal": rows.steps_to_goal[sel],
            **row_labels(rows.steps_to_goal[sel], self.mixture.gamma, scores.terminal), **extra,
        }

    def __iter__(self):
        index = 0
        while True:
            yield self.batch(256, index)
            index += 1

