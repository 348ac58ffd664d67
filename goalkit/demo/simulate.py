"""Run many bench episodes at once: starting states, tasks, controllers, rollouts."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from goalkit import rng
from goalkit.demo.bench import BenchState, GantryParams, step
from goalkit.demo.camera import render
from goalkit.demo.controllers import CONTROLLERS, DEMO_STREAMS, act
from goalkit.demo.tasks import success_flags, task_count, task_goals

#: Longest episode (transitions); an episode also ends on its first success.
MAX_STEPS = 80
#: Share of episodes run by each controller (scripted, noisy, random).
CONTROLLER_SHARES = (0.4, 0.4, 0.2)


@dataclass(frozen=True)
class Rollouts:
    """Episodes simulated in lockstep, padded to ``S = max_steps + 1`` states.

    Attributes
    ----------
    params : GantryParams
        Bench constants.
    seed : int
        The seed the episodes were drawn with.
    episode_ids : ndarray of int64, shape (E,)
        Episode indices (address every random draw).
    tasks, controllers : ndarray of int64, shape (E,)
        Task id and controller code (index of :data:`goalkit.demo.controllers.CONTROLLERS`).
    lengths : ndarray of int64, shape (E,)
        Transitions per episode ``T``: up to and including the first success, else ``max_steps``.
    head, velocity : ndarray, shape (E, S, 3)
        Head position and velocity of states ``s_0 .. s_{S-1}``.
    trays : ndarray, shape (E, S, K)
        Tray centres.
    actions : ndarray, shape (E, S - 1, 3)
        Commands (already clipped to [-1, 1]).
    success : ndarray of bool, shape (E, S - 1)
        Success flag of each transition (False past an episode's end).
    goals : ndarray, shape (E, 3 + K)
        The goal of each episode's task, in goal space.
    frames : ndarray of uint8, shape (E, S, 32, 32), optional
        Camera frames.
    """

    params: GantryParams
    seed: int
    episode_ids: np.ndarray
    tasks: np.ndarray
    controllers: np.ndarray
    lengths: np.ndarray
    head: np.ndarray
    velocity: np.ndarray
    trays: np.ndarray
    actions: np.ndarray
    success: np.ndarray
    goals: np.ndarray
    frames: np.ndarray | None = None

    @property
    def num_episodes(self) -> int:
        """Number of episodes ``E``."""
        return int(self.episode_ids.shape[0])

    def success_rate(self, controller: str) -> float:
        """Share of the episodes run by ``controller`` that succeeded (NaN if there are none)."""
        mine = self.controllers == CONTROLLERS.index(controller)
        if not mine.any():
            return float("nan")
        return float(self.success[mine].any(axis=1).mean())


def start_states(seed: int, episodes: np.ndarray, params: GantryParams) -> BenchState:
    """Draw starting states: head at rest at a random point 0.25-0.35 m up, trays left of the strip.

    Parameters
    ----------
    seed : int
        Demo seed.
    episodes : ndarray of int, shape (E,)
        Episode ids.
    params : GantryParams
        Bench constants.

    Returns
    -------
    BenchState
        Head ``x ~ U(0.1, length - 0.1)``, ``y ~ U(0.05, depth - 0.05)``, ``z ~ U(0.25, 0.35)``,
        zero velocity; tray centres ``~ U(tray_start)`` independently.
    """
    ep = np.asarray(episodes, dtype=np.int64)[:, None]
    K = params.trays
    u = rng.uniform(seed, ep, 0, np.arange(3 + K)[None, :], DEMO_STREAMS["start"])
    lo = np.array([0.1, 0.05, 0.25])
    hi = np.array([params.length - 0.1, params.depth - 0.05, 0.35])
    head = lo + (hi - lo) * u[:, :3]
    a, b = params.tray_start
    trays = a + (b - a) * u[:, 3:]
    return BenchState(head=head, velocity=np.zeros_like(head), trays=trays)


def draw_tasks(seed: int, episodes: np.ndarray, params: GantryParams) -> np.ndarray:
    """Draw each episode's task id uniformly from the ``2 K`` tasks."""
    ep = np.asarray(episodes, dtype=np.int64)
    return rng.integers(seed, 0, task_count(params), ep, 0, 0, DEMO_STREAMS["task"])


def draw_controllers(seed: int, episodes: np.ndarray, shares=CONTROLLER_SHARES) -> np.ndarray:
    """Draw each episode's controller code with probabilities ``shares``."""
    u = rng.uniform(seed, np.asarray(episodes, dtype=np.int64), 0, 0, DEMO_STREAMS["controller"])
    edges = np.cumsum(shares) / np.sum(shares)
    return np.minimum(np.searchsorted(edges, u, side="right"), len(shares) - 1).astype(np.int64)


def simulate(episodes: int, seed: int = 0, params: GantryParams | None = None, *,
             controller: str | None = None, frames: bool = False, max_steps: int = MAX_STEPS,
             first_episode: int = 0) -> Rollouts:
    """Simulate bench episodes.

    Parameters
    ----------
    episodes : int
        Number of episodes ``E``.
    seed : int
        Seed; episode ``i``'s draws depend only on ``(seed, first_episode + i)``.
    params : GantryParams, optional
        Bench constants (default: three trays).
    controller : {"scripted", "noisy", "random"}, optional
        Run every episode with this controller instead of drawing one per episode.
    frames : bool
        Also render camera frames.
    max_steps : int
        Longest episode.
    first_episode : int
        Id of the first episode.

    Returns
    -------
    Rollouts

    Examples
    --------
    >>> r = simulate(4, seed=1, controller="scripted")
    >>> bool(r.success.any(axis=1).all())
    True
    """
    params = params or GantryParams()
    ids = first_episode + np.arange(episodes, dtype=np.int64)
    tasks = draw_tasks(seed, ids, params)
    if controller is None:
        kinds = draw_controllers(seed, ids)
    else:
        kinds = np.full(episodes, CONTROLLERS.index(controller), dtype=np.int64)
    state = start_states(seed, ids, params)
    goals = task_goals(tasks, state.trays, params)
    S = max_steps + 1
    K = params.trays
    head = np.empty((episodes, S, 3))
    velocity = np.empty((episodes, S, 3))
    trays = np.empty((episodes, S, K))
    actions = np.empty((episodes, max_steps, 3))
    pics = np.empty((episodes, S, 32, 32), dtype=np.uint8) if frames else None
    for t in range(S):  # the simulator's time loop; vectorised over episodes
        head[:, t], velocity[:, t], trays[:, t] = state.head, state.velocity, state.trays
        if frames:
            pics[:, t] = render(state.head, state.trays, params)
        if t == max_steps:
            break
        a = np.clip(act(kinds, state, tasks, params, seed, ids, t), -1.0, 1.0)
        actions[:, t] = a
        state = step(state, a, params)
    full = success_flags(tasks, goals, head, trays, np.full(episodes, max_steps), params)
    done = full.any(axis=1)
    lengths = np.where(done, full.argmax(axis=1) + 1, max_steps).astype(np.int64)
    success = full & (np.arange(max_steps)[None, :] < lengths[:, None])
    return Rollouts(params=params, seed=int(seed), episode_ids=ids, tasks=tasks, controllers=kinds,
                    lengths=lengths, head=head, velocity=velocity, trays=trays, actions=actions,
                    success=success, goals=goals, frames=pics)
