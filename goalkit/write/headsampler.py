"""The multi-head training sampler: one batch of transitions, several goals per transition.

Each head (:class:`goalkit.heads.GoalHead`) draws its own goal for every row of the
batch from its own mixture of goal sources, and gets its own reward, reached flag,
steps-to-goal, discount weight, Monte-Carlo return and bootstrap mask. Rows are scored by the
one scorer, :func:`goalkit.reward.score`, with the recipe's reward rule.

Batch ``b`` is a pure function of (seed, ``b``): its random words are batch ``b`` of the
"heads" stream (:class:`goalkit.rng.BatchBits`). Everything indexed by transition is built once
when the sampler is made; a batch does work in proportion to its size and the number of heads,
never to the number of transitions.

Labels of a head with discount ``gamma``, for a row whose goal is ``d = steps_to_goal`` steps
ahead in the same episode (``d >= 0``; ``d = 0`` for a current-state goal):

* ``discount_weight = gamma**d``,
* ``return_to_goal = -(1 - gamma**d) / (1 - gamma)``, the discounted return of a reward of -1
  per step over the ``d`` steps to the goal state,
* ``bootstrap_mask = 1 - terminal``: 0 only when the transition reaches the goal and the rule
  ends episodes on reaching (``end_on_reach``); the end of a logged episode (a time limit) is
  never terminal.

Rows whose goal is not a same-episode state at or after ``s_t`` (random states, in-batch
negatives, other episodes) have ``steps_to_goal = -1``, ``discount_weight = 0`` and
``return_to_goal = -1 / (1 - gamma)``: the limits of both formulas as ``d`` grows, i.e. the
log shows no path to the goal.
"""

from __future__ import annotations

import numpy as np

from goalkit.errors import RecipeError
from goalkit.goals.stategraph import graph_steps
from goalkit.heads import SOURCE_CODES, GoalHead
from goalkit.pipeline.chunk import row_labels, transition_columns
from goalkit.reward import score
from goalkit.rng import BatchBits
from goalkit.rows import LABEL_COLUMNS
from goalkit.write.sampler import load_split

_CUR, _FUT, _GEO, _RND, _NEG, _FIN, _EPI, _SUB = (SOURCE_CODES[n] for n in (
    "current", "future", "geometric", "random", "negative", "final", "episode", "subgoal"))


def head_labels(steps, gamma) -> tuple[np.ndarray, np.ndarray]:
    """Discount weight and Monte-Carlo return to the goal for ``steps`` (-1: no path).

    The arithmetic of a built set's label columns (:func:`goalkit.pipeline.chunk.row_labels`).

    Parameters
    ----------
    steps : array_like of int
        Steps to the goal, ``d >= 0``, or -1 when the log shows no path to it.
    gamma : float or array_like
        Discount in (0, 1), broadcast against ``steps``.

    Returns
    -------
    (weight, ret) : float32 ndarrays
        ``gamma**d`` and ``-(1 - gamma**d) / (1 - gamma)``; 0 and ``-1 / (1 - gamma)`` where
        ``steps`` is -1.

    Examples
    --------
    >>> w, r = head_labels([10, -1], 0.99)
    >>> round(float(w[0]), 4), round(float(r[0]), 4), float(w[1]), round(float(r[1]), 6)
    (0.9044, -9.5618, 0.0, -100.0)
    """
    cols = row_labels(steps, gamma, np.zeros(np.shape(steps), np.uint8))
    return cols["discount_weight"], cols["return_to_goal"]


class HeadSampler:
    """Draw batches of transitions with one goal per head for every row.

    Parameters
    ----------
    recipe : Recipe
        Goal map, reward rule, split and seed come from it (its strategy mixture is not used).
    heads : sequence of GoalHead, optional
        The heads; default the recipe's ``[heads.NAME]`` tables.
    split : {"train", "validation"}
        Which episodes to sample from.
    source : LogSource, optional
        Opened logs (default: the recipe's).

    Notes
    -----
    The split's episodes are held in memory, as for :class:`goalkit.GoalSampler`. Use
    :meth:`from_arrays` for episodes already in memory.

    Examples
    --------
    >>> heads = [GoalHead("value", {"current": 0.2, "geometric": 0.5, "random": 0.3}),
    ...          GoalHead("policy", {"geometric": 1}), GoalHead("subgoal", {"subgoal": 1}, steps=25)]
    >>> sampler = HeadSampler(load_recipe("gantry-demo/gantry-recipe.toml"), heads)  # doctest: +SKIP
    >>> batch = sampler.batch(256, index=0)                                          # doctest: +SKIP
    >>> batch["value"]["goal"].shape, batch["subgoal"]["steps_to_goal"].max() <= 25  # doctest: +SKIP
    ((256, 6), True)
    """

    def __init__(self, recipe, heads=None, split: str = "train", source=None):
        heads = tuple(recipe.heads if heads is None else heads)
        plan, eps, phi = load_split(recipe, split, source)
        self.recipe = recipe
        self._setup(phi, eps.offsets, recipe.reward, heads, recipe.seed, eps.observations, eps.actions,
                    eps.episode_ids, recipe.file)
        # the optional columns a set built from the recipe stores, indexed once
        every_t = np.arange(eps.num_transitions)
        cols = transition_columns(plan, eps, every_t, eps.transition_episode())
        self._extra = {k: ("episode", np.take(v, eps.offsets[:-1], axis=0)) if k == "source" else ("transition", v)
                       for k, v in cols.items()}
        self._graph = None if plan.graph is None else (plan.graph, recipe.graph)

    @classmethod
    def from_arrays(cls, goals, offsets, rule, heads, seed: int = 0, observations=None, actions=None,
                    episode_ids=None, *, terminations=None, time_limits=None, sources=None,
                    task_rewards=None) -> "HeadSampler":
        """A sampler over episodes held as flat arrays.

        Parameters
        ----------
        goals : ndarray (N + E, G)
            phi of every state, episode by episode (states ``s_0 .. s_T`` of each).
        offsets : ndarray of int (E + 1,)
            Transition offsets (``offsets[0] == 0``, ``offsets[-1] == N``, episodes of >= 1
            transition).
        rule : RewardRule
        heads : sequence of GoalHead
        seed : int
        observations : ndarray (N + E, D), optional
        actions : ndarray (N, A), optional
        episode_ids : ndarray of int (E,), optional
            Default ``0 .. E - 1``.
        terminations, time_limits : ndarray of bool (N,), optional
            The log's end flags of each transition: batches then carry ``termination`` and
            ``time_limit`` (uint8).
        sources : ndarray of int (E,), optional
            The log source of each episode: batches then carry ``source`` (uint16).
        task_rewards : ndarray (N,), optional
            The log's own reward of each transition: batches then carry ``task_reward`` (float32).
        """
        self = cls.__new__(cls)
        self.recipe = None
        self._setup(goals, offsets, rule, tuple(heads), seed, observations, actions, episode_ids, None)
        self._extra = {}
        for name, values, by, dtype in (("task_reward", task_rewards, "transition", np.float32),
                                        ("termination", terminations, "transition", np.uint8),
                                        ("time_limit", time_limits, "transition", np.uint8),
                                        ("source", sources, "episode", np.uint16)):
            if values is None:
                continue
            values = np.asarray(values)
            want = self.num_transitions if by == "transition" else len(self.lengths)
            if values.shape != (want,):
                raise ValueError(f"{name}: expected one value per {by} ({want}), got shape {values.shape}")
            self._extra[name] = (by, values.astype(dtype))
        self._graph = None
        return self

    def _setup(self, phi, offsets, rule, heads, seed, observations, actions, episode_ids, file):
        if not heads:
            raise RecipeError("no goal heads: give heads=[GoalHead(...)] or [heads.NAME] tables in the recipe",
                              file=file, key="heads")
        if not all(isinstance(h, GoalHead) for h in heads):
            raise TypeError("heads must be GoalHead objects")
        names = [h.name for h in heads]
        if len(set(names)) != len(names):
            raise RecipeError(f"head names must differ, got {names}", file=file, key="heads")
        offsets = np.asarray(offsets, dtype=np.int64)
        lengths = np.diff(offsets)
        if offsets[0] != 0 or (lengths < 1).any():
            raise ValueError("offsets must start at 0 and give every episode at least one transition")
        n_eps = len(lengths)
        if phi.shape[0] != offsets[-1] + n_eps:
            raise ValueError(f"goals must have one row per state ({offsets[-1] + n_eps}), got {phi.shape[0]}")
        self.heads, self.rule, self.seed = heads, rule, int(seed)
        self.phi, self.observations, self.actions = phi, observations, actions
        self.offsets, self.lengths = offsets, lengths
        self.episode_ids = (np.arange(n_eps, dtype=np.int64) if episode_ids is None
                            else np.asarray(episode_ids, dtype=np.int64))
        small = np.int32 if n_eps < 2 ** 31 else np.int64
        # indexed by transition / by state once, here; a batch only gathers from them
        self._t_episode = np.repeat(np.arange(n_eps, dtype=small), lengths)
        self._s_episode = np.repeat(np.arange(n_eps, dtype=small), lengths + 1)
        self._s_start = offsets[:-1] + np.arange(n_eps)
        self.num_transitions = int(offsets[-1])
        self._n_states = int(phi.shape[0])
        probs = np.zeros((len(heads), len(SOURCE_CODES)))
        for h, head in enumerate(heads):
            for src, p in head.probabilities().items():
                probs[h, SOURCE_CODES[src]] = p
        cum = np.cumsum(probs, axis=1)
        last = np.array([np.flatnonzero(p > 0).max() for p in probs])
        for h, k in enumerate(last):
            cum[h, k:] = np.inf  # rounding never picks a source of weight 0 past the last one
        self._cum = cum
        self._used = set(np.flatnonzero(probs.any(axis=0)).tolist())
        self._gamma = np.array([h.gamma for h in heads])[:, None]
        self._log_gamma = np.log(self._gamma)
        self._renorm = np.array([h.past_end == "renormalise" for h in heads])[:, None]
        self._scale = True if self._renorm.any() else None
        self._steps = np.array([h.steps for h in heads], dtype=np.int64)[:, None]
        self._bits = BatchBits(self.seed, "heads")

    def batch(self, batch_size: int, index: int) -> dict:
        """Return batch number ``index``: ``batch_size`` transitions and every head's goals.

        Returns
        -------
        dict
            Shared columns ``source_episode``, ``source_step`` and, when the sampler has them,
            ``observation``, ``action``, ``next_observation``; ``reached_goal`` (phi(s_t+1));
            the transition's facts a built set stores when the logs and recipe give them:
            ``task_reward``, ``termination``, ``time_limit`` (the log's end flags, uint8) and
            ``source`` (the log source, uint16); and per head name a dict of ``goal``,
            ``source`` (the goal source: uint8 code, :data:`goalkit.heads.SOURCE_CODES`),
            ``goal_episode``, ``goal_step``, ``steps_to_goal``, ``goal_distance``, ``reward``,
            ``reached``, ``terminal``, ``discount_weight``, ``return_to_goal``,
            ``bootstrap_mask`` and, with the recipe's ``[graph]`` table, ``graph_steps`` (steps
            from s_t+1 to the goal state in the logs' graph, as a built set labels them).
        """
        b = int(batch_size)
        if b < 2 and _NEG in self._used:
            raise ValueError("in-batch negatives need a batch of at least 2 rows")
        nh = len(self.heads)
        u = self._bits.uniform(int(index), b * (1 + 2 * nh) + nh)
        i = (u[:b] * self.num_transitions).astype(np.int64)
        e = self._t_episode.take(i).astype(np.int64)
        t = i - self.offsets.take(e)
        T = self.lengths.take(e)
        cur = i + e
        start = cur - t
        us = u[b:b + nh * b].reshape(nh, b)
        up = u[b + nh * b:b + 2 * nh * b].reshape(nh, b)
        src = np.empty((nh, b), dtype=np.uint8)
        for h in range(nh):  # one search per head
            src[h] = np.searchsorted(self._cum[h], us[h], side="right")
        used = self._used
        # goal step within the own episode (same-episode sources), on the (heads, rows) grid
        tt = np.tile(t, (nh, 1))
        j = tt  # current
        room = T - t
        if used & {_GEO, _NEG}:
            q = up if self._scale is None else up * np.where(self._renorm, -np.expm1(room * self._log_gamma), 1.0)
            k = np.ceil(np.log1p(-q) / self._log_gamma)
            geo = t + np.minimum(np.maximum(k, 1.0), room).astype(np.int64)
            j = np.where(src == _GEO, geo, j)
        if _FUT in used:
            j = np.where(src == _FUT, t + 1 + (up * room).astype(np.int64), j)
        if _FIN in used:
            j = np.where(src == _FIN, T, j)
        if _EPI in used:
            j = np.where(src == _EPI, (up * (T + 1)).astype(np.int64), j)
        if _SUB in used:
            j = np.where(src == _SUB, np.minimum(t + self._steps, T), j)
        row = start + j  # state row of the goal
        ge = np.tile(e, (nh, 1))
        if _RND in used:
            rnd = src == _RND
            r = (up * self._n_states).astype(np.int64)
            np.copyto(row, r, where=rnd)
            np.copyto(ge, self._s_episode.take(r), where=rnd)
        if _NEG in used:
            neg = src == _NEG
            shift = 1 + (u[-nh:] * (b - 1)).astype(np.int64)
            other = (np.arange(b) + shift[:, None]) % b
            np.copyto(row, np.take_along_axis(start + geo, other, axis=1), where=neg)
            np.copyto(ge, e[other], where=neg)
        gstep = row - self._s_start.take(ge)
        steps = np.where((ge == e) & (gstep >= tt), gstep - tt, -1)
        achieved = self.phi.take(cur + 1, axis=0)
        goal = self.phi.take(row.ravel(), axis=0)
        sc = score(self.rule, np.tile(achieved, (nh, 1)), goal)
        labels = row_labels(steps, self._gamma, sc.terminal.reshape(steps.shape))
        shape = (nh, b)
        dist = sc.distance.astype(np.float32).reshape(shape)
        reward = sc.reward.reshape(shape)
        terminal = sc.terminal.reshape(shape)
        reached = sc.reached.reshape(shape).view(np.uint8)
        goal = goal.reshape((nh, b) + goal.shape[1:])
        weight, ret, mask = (labels[name] for name in LABEL_COLUMNS)
        terminal = terminal.view(np.uint8)
        gep = self.episode_ids.take(ge)
        out = {"source_episode": self.episode_ids.take(e), "source_step": t, "reached_goal": achieved}
        if self.observations is not None:
            out["observation"] = self.observations.take(cur, axis=0)
            out["next_observation"] = self.observations.take(cur + 1, axis=0)
        if self.actions is not None:
            out["action"] = self.actions.take(i, axis=0)
        for name, (by, values) in self._extra.items():
            out[name] = values.take(i if by == "transition" else e)
        hops = None
        if self._graph is not None:
            graph, spec = self._graph
            ids = np.tile(out["source_episode"], nh)
            hops = graph_steps(graph, spec, self.seed, None, ids, tt.ravel(), gep.ravel(),
                               gstep.ravel()).reshape(shape)
        for h, head in enumerate(self.heads):
            out[head.name] = {
                "goal": goal[h], "source": src[h], "goal_episode": gep[h], "goal_step": gstep[h],
                "steps_to_goal": steps[h], "goal_distance": dist[h], "reward": reward[h],
                "reached": reached[h], "terminal": terminal[h], "discount_weight": weight[h],
                "return_to_goal": ret[h], "bootstrap_mask": mask[h]}
            if hops is not None:
                out[head.name]["graph_steps"] = hops[h]
        return out

    def __iter__(self):
        index = 0
        while True:
            yield self.batch(256, index)
            index += 1
