"""Align messages of one topic (times and values) to step times, vectorised.

Times are int64 nanoseconds (the bag's clock). Three rules:

* ``latest``: the last message at or before the step (a step before the first message has
  none: index -1);
* ``nearest``: the message closest in time (ties go to the earlier one);
* ``interpolate``: linear interpolation between the messages around the step, for continuous
  signals only (float values); steps outside the messages' span take the end value.
"""

from __future__ import annotations

import numpy as np

RULES = ("latest", "nearest", "interpolate")


def latest_index(t_msg: np.ndarray, t_step: np.ndarray) -> np.ndarray:
    """Index of the last message at or before each step, -1 when there is none.

    Examples
    --------
    >>> latest_index(np.array([10, 20, 30]), np.array([5, 10, 29, 40])).tolist()
    [-1, 0, 1, 2]
    """
    return np.searchsorted(t_msg, t_step, side="right").astype(np.int64) - 1


def nearest_index(t_msg: np.ndarray, t_step: np.ndarray) -> np.ndarray:
    """Index of the message nearest each step (the earlier one on a tie).

    Examples
    --------
    >>> nearest_index(np.array([10, 20, 30]), np.array([0, 15, 16, 99])).tolist()
    [0, 0, 1, 2]
    """
    n = t_msg.shape[0]
    right = np.clip(np.searchsorted(t_msg, t_step, side="left"), 0, n - 1)
    left = np.clip(right - 1, 0, n - 1)
    take_left = np.abs(t_step - t_msg[left]) <= np.abs(t_msg[right] - t_step)
    return np.where(take_left, left, right).astype(np.int64)


def interpolate(t_msg: np.ndarray, values: np.ndarray, t_step: np.ndarray) -> np.ndarray:
    """Linear interpolation of ``values`` (rows = messages) at the step times.

    Examples
    --------
    >>> interpolate(np.array([0, 10]), np.array([[0.0], [1.0]]), np.array([0, 5, 10])).ravel().tolist()
    [0.0, 0.5, 1.0]
    """
    n = t_msg.shape[0]
    if n == 1:
        return np.repeat(values[:1], t_step.shape[0], axis=0).astype(np.float64)
    i = np.clip(np.searchsorted(t_msg, t_step, side="right") - 1, 0, n - 2)
    t0, t1 = t_msg[i], t_msg[i + 1]
    w = np.clip((t_step - t0).astype(np.float64) / (t1 - t0).astype(np.float64), 0.0, 1.0)
    v0, v1 = values[i].astype(np.float64), values[i + 1].astype(np.float64)
    return v0 + w[:, None] * (v1 - v0)


def align(rule: str, t_msg: np.ndarray, values: np.ndarray, t_step: np.ndarray) -> np.ndarray:
    """Values of a topic at the step times under ``rule`` (one of :data:`RULES`).

    ``latest`` needs a message at or before the first step (the caller makes sure).
    """
    if rule == "interpolate":
        return interpolate(t_msg, values, t_step)
    idx = latest_index(t_msg, t_step) if rule == "latest" else nearest_index(t_msg, t_step)
    return values[idx]
