"""Tasks on the bench: ids, names, the goal each asks for, and when it is done.

Task ids for ``K`` trays: ``0 .. K-1`` are "water tray k", ``K .. 2K-1`` are "slide tray
k into the light strip" (``k = id - K``).

Goal space: ``head (x, y, z)`` followed by the ``K`` tray centres, the same vector as the
observation fields ``head`` and ``trays`` concatenated (the demo recipe's goal fields).
"""

from __future__ import annotations

import numpy as np

from goalkit.demo.bench import GantryParams

#: Radius (m) around the watering point, in goal space, that counts as "over the tray".
WATER_RADIUS = 0.04
#: Consecutive states within :data:`WATER_RADIUS` needed for watering to succeed.
WATER_HOLD = 3


def task_count(params: GantryParams) -> int:
    """Number of tasks, ``2 K``."""
    return 2 * params.trays


def task_name(task: int, params: GantryParams) -> str:
    """Return the task's name, e.g. ``"water tray 1"`` or ``"slide tray 0 into the light strip"``."""
    k = int(task) % params.trays
    if int(task) < params.trays:
        return f"water tray {k}"
    return f"slide tray {k} into the light strip"


def task_goals(tasks: np.ndarray, trays0: np.ndarray, params: GantryParams) -> np.ndarray:
    """Return the goal each episode's task asks for, in goal space.

    Parameters
    ----------
    tasks : ndarray of int, shape (E,)
        Task ids.
    trays0 : ndarray, shape (E, K)
        Tray centres at the start of the episode.
    params : GantryParams
        Bench constants.

    Returns
    -------
    ndarray, shape (E, 3 + K)
        Water tray k: head at the watering point over tray k's starting centre
        ``(c_k, lane_k, water_height)``, every tray where it started.
        Slide tray k: tray k centred in the light strip, the others where they started, and the
        head at the pose that finishes the push from the left
        ``(strip_centre - tray_half_length - head_radius, lane_k, push_height)``.
    """
    tasks = np.asarray(tasks, dtype=np.int64)
    K = params.trays
    E = tasks.shape[0]
    k = tasks % K
    water = tasks < K
    rows = np.arange(E)
    goal = np.empty((E, 3 + K))
    goal[:, 3:] = trays0
    finish_x = params.strip_centre - params.tray_half_length - params.head_radius
    goal[:, 0] = np.where(water, trays0[rows, k], finish_x)
    goal[:, 1] = params.lanes[k]
    goal[:, 2] = np.where(water, params.water_height, params.push_height)
    goal[rows[~water], 3 + k[~water]] = params.strip_centre
    return goal


def goal_vector(head: np.ndarray, trays: np.ndarray) -> np.ndarray:
    """Return the goal-space vector of states: ``head`` and ``trays`` side by side."""
    return np.concatenate([head, trays], axis=-1)


def success_flags(tasks: np.ndarray, goals: np.ndarray, head: np.ndarray, trays: np.ndarray,
                  lengths: np.ndarray, params: GantryParams) -> np.ndarray:
    """Return each transition's success flag from the states it reaches.

    Parameters
    ----------
    tasks : ndarray of int, shape (E,)
        Task ids.
    goals : ndarray, shape (E, 3 + K)
        The tasks' goals (:func:`task_goals`).
    head : ndarray, shape (E, S, 3)
        Head positions ``s_0 .. s_{S-1}`` of each episode (padded past its end).
    trays : ndarray, shape (E, S, K)
        Tray centres, aligned with ``head``.
    lengths : ndarray of int, shape (E,)
        Transitions per episode ``T`` (steps past ``T`` are ignored and returned False).
    params : GantryParams
        Bench constants.

    Returns
    -------
    ndarray of bool, shape (E, S - 1)
        Flag of transition ``t`` (reaching ``s_{t+1}``). Watering tray ``k`` succeeds when the
        goal-space distance ``||(head, trays) - goal||`` is at most :data:`WATER_RADIUS` in
        each of the :data:`WATER_HOLD` states ending at ``s_{t+1}`` (never counting ``s_0``).
        Sliding tray ``k`` succeeds when tray ``k``'s centre lies in the light strip
        (inclusive bounds) at ``s_{t+1}``.
    """
    tasks = np.asarray(tasks, dtype=np.int64)
    K = params.trays
    E, S = head.shape[:2]
    k = tasks % K
    water = tasks < K
    dist = np.linalg.norm(goal_vector(head, trays) - goals[:, None, :], axis=-1)  # (E, S)
    close = dist[:, 1:] <= WATER_RADIUS                                         # s_1 .. s_{S-1}
    run = np.zeros((E, S - 1), dtype=bool)
    if S - 1 >= WATER_HOLD:
        windows = np.lib.stride_tricks.sliding_window_view(close, WATER_HOLD, axis=1)
        run[:, WATER_HOLD - 1:] = windows.all(axis=-1)
    centre = trays[np.arange(E), 1:, k]                                          # (E, S - 1)
    in_strip = (centre >= params.strip[0]) & (centre <= params.strip[1])
    flags = np.where(water[:, None], run, in_strip)
    flags &= np.arange(S - 1)[None, :] < np.asarray(lengths)[:, None]
    return flags


def mask_table_text(params: GantryParams, random_share: float = 0.0) -> str:
    """Return a recipe ``[mask]`` table (TOML) giving each task the goal dimensions it constrains.

    Groups: ``head`` (goal dimensions 0-2) and ``tray<k>`` (dimension ``3 + k``). A watering
    task constrains the head; a sliding task constrains its tray.

    Examples
    --------
    >>> print(mask_table_text(GantryParams(trays=1)))
    [mask]
    groups = { head = [0, 1, 2], tray0 = [3] }
    tasks = { "0" = ["head"], "1" = ["tray0"] }
    random_share = 0.0
    <BLANKLINE>
    """
    K = params.trays
    groups = ", ".join(["head = [0, 1, 2]"] + [f"tray{k} = [{3 + k}]" for k in range(K)])
    tasks = ", ".join([f'"{k}" = ["head"]' for k in range(K)] + [f'"{K + k}" = ["tray{k}"]' for k in range(K)])
    return f"[mask]\ngroups = {{ {groups} }}\ntasks = {{ {tasks} }}\nrandom_share = {float(random_share)!r}\n"
