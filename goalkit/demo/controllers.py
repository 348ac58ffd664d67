"""Controllers that drive the gantry head: scripted, noisy-scripted and random (vectorised).

Randomness goes through :mod:`goalkit.rng` (addressed by seed, episode id, step, slot and a
demo stream), so each episode's actions depend only on the seed and the episode's index.
"""

from __future__ import annotations

import numpy as np

from goalkit import rng
from goalkit.demo.bench import BenchState, GantryParams, tray_boxes

#: Controller kinds, in the order of their codes.
CONTROLLERS = ("scripted", "noisy", "random")

#: goalkit.rng stream numbers used by the demo (kept clear of the build's streams).
DEMO_STREAMS = {"start": 1001, "task": 1002, "controller": 1003, "noise": 1004, "random": 1005}

#: Proportional and derivative gains of the scripted controller (command units per m, per m/s).
GAINS = (6.0, 2.0)
#: Standard deviation of the noisy controller's Gaussian action noise (command units).
NOISE_STD = 0.4
#: Chance per step that the noisy controller issues a random command instead of its own.
LAPSE_RATE = 0.1


def normal(seed: int, episodes: np.ndarray, step: int, slots: int, stream: int) -> np.ndarray:
    """Standard normal draws ``(E, slots)`` by the Box-Muller transform of :func:`goalkit.rng.uniform`."""
    ep = np.asarray(episodes, dtype=np.int64)[:, None]
    slot = np.arange(slots, dtype=np.int64)[None, :]
    u1 = rng.uniform(seed, ep, step, 2 * slot, stream)
    u2 = rng.uniform(seed, ep, step, 2 * slot + 1, stream)
    return np.sqrt(-2.0 * np.log1p(-u1)) * np.cos(2.0 * np.pi * u2)


def scripted_action(state: BenchState, tasks: np.ndarray, params: GantryParams) -> np.ndarray:
    """Return the scripted controller's commands ``(E, 3)`` in [-1, 1].

    A feedback policy (no memory): it chooses a target point from the state and steers the
    head there with a clipped PD law ``a = clip(kp (target - p) - kd v, -1, 1)``.

    Parameters
    ----------
    state : BenchState
        Current states.
    tasks : ndarray of int, shape (E,)
        Task ids (see :mod:`goalkit.demo.tasks`).
    params : GantryParams
        Bench constants.

    Returns
    -------
    ndarray, shape (E, 3)

    Notes
    -----
    Water tray k: travel at ``safe_height`` to above the tray's centre, then descend to
    ``water_height`` and stay. Slide tray k: travel to a point 5 cm left of the tray's left
    end, descend to ``push_height``, then drive towards +x until the tray's centre would sit
    2 cm right of the strip's centre. While low and far from its next point the head first
    rises, so travel never sweeps the trays.
    """
    kp, kd = GAINS
    p, v = state.head, state.velocity
    E = p.shape[0]
    rows = np.arange(E)
    tasks = np.asarray(tasks, dtype=np.int64)
    k = tasks % params.trays
    water = tasks < params.trays
    c = state.trays[rows, k]
    lane = params.lanes[k]
    hx, _, top = tray_boxes(params)

    # watering
    d_tray = np.hypot(p[:, 0] - c, p[:, 1] - lane)
    over = d_tray < 0.03
    w_target = np.stack([c, lane, np.where(over, params.water_height, params.safe_height)], axis=1)
    w_far = d_tray > 0.06

    # sliding
    col_x = c - hx - 0.05
    behind = ((p[:, 2] < top - 0.01) & (np.abs(p[:, 1] - lane) < 0.05)
              & (p[:, 0] <= c - hx + 0.005) & (p[:, 0] >= c - hx - 0.1))
    d_col = np.hypot(p[:, 0] - col_x, p[:, 1] - lane)
    at_col = d_col < 0.04
    push_x = params.strip_centre + 0.02 - hx
    s_x = np.where(behind, push_x, col_x)
    s_z = np.where(behind | at_col, params.push_height, params.safe_height)
    s_target = np.stack([s_x, lane, s_z], axis=1)
    s_far = ~behind & (d_col > 0.06)

    target = np.where(water[:, None], w_target, s_target)
    far = np.where(water, w_far, s_far)
    low = p[:, 2] < params.safe_height - 0.05
    hold_xy = far & low
    target[:, :2] = np.where(hold_xy[:, None], p[:, :2], target[:, :2])
    return np.clip(kp * (target - p) - kd * v, -1.0, 1.0)


def noisy_action(state: BenchState, tasks: np.ndarray, params: GantryParams, seed: int,
                 episodes: np.ndarray, step: int) -> np.ndarray:
    """Return the noisy-scripted controller's commands ``(E, 3)``.

    The scripted command plus Gaussian noise of standard deviation :data:`NOISE_STD`; with
    probability :data:`LAPSE_RATE` per step the command is replaced by a uniform random one.
    Both are clipped to [-1, 1]. ``episodes`` are the episode ids, ``step`` the time step
    (they address the random draws).
    """
    base = scripted_action(state, tasks, params)
    noise = normal(seed, episodes, step, 3, DEMO_STREAMS["noise"])
    lapse = rng.uniform(seed, np.asarray(episodes), step, 3, DEMO_STREAMS["random"]) < LAPSE_RATE
    wild = random_action(seed, episodes, step)
    return np.where(lapse[:, None], wild, np.clip(base + NOISE_STD * noise, -1.0, 1.0))


def random_action(seed: int, episodes: np.ndarray, step: int) -> np.ndarray:
    """Return uniform random commands on [-1, 1]^3, shape ``(E, 3)``, addressed by episode id and step."""
    ep = np.asarray(episodes, dtype=np.int64)[:, None]
    u = rng.uniform(seed, ep, step, np.arange(3)[None, :], DEMO_STREAMS["random"])
    return 2.0 * u - 1.0


def act(kinds: np.ndarray, state: BenchState, tasks: np.ndarray, params: GantryParams, seed: int,
        episodes: np.ndarray, step: int) -> np.ndarray:
    """Return each bench's command from its controller kind (codes index :data:`CONTROLLERS`).

    Parameters
    ----------
    kinds : ndarray of int, shape (E,)
        Controller code of each episode.
    state, tasks, params
        As for :func:`scripted_action`.
    seed : int
        The demo's seed.
    episodes : ndarray of int, shape (E,)
        Episode ids (address the random draws).
    step : int
        Time step.

    Returns
    -------
    ndarray, shape (E, 3)
    """
    kinds = np.asarray(kinds)[:, None]
    scripted = scripted_action(state, tasks, params)
    noisy = noisy_action(state, tasks, params, seed, episodes, step)
    wild = random_action(seed, episodes, step)
    return np.where(kinds == 0, scripted, np.where(kinds == 1, noisy, wild))
