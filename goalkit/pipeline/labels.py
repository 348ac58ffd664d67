"""The training labels of a goal row: discount weight, return to goal, bootstrap mask."""

from __future__ import annotations

import numpy as np

from goalkit.rows import LABEL_COLUMNS


def row_labels(steps_to_goal, gamma, terminal) -> dict:
    """The training-label columns of rows (:data:`goalkit.rows.LABEL_COLUMNS`), in stored dtypes.

    With ``d = steps_to_goal``: ``discount_weight = gamma**d`` and ``return_to_goal =
    -(1 - gamma**d) / (1 - gamma)`` (reward -1 per step over the ``d`` steps to the goal state)
    where ``d >= 0``; where ``d`` is -1 (the log shows no path to the goal: other episodes,
    external goals, earlier states) the limits as ``d`` grows, 0 and ``-1 / (1 - gamma)``.
    ``bootstrap_mask = 1 - terminal``. Computed in float64, stored as float32.

    Parameters
    ----------
    steps_to_goal : array_like of int
    gamma : float or array_like
        Discount in (0, 1), broadcast against ``steps_to_goal``.
    terminal : array_like of bool or uint8

    Examples
    --------
    >>> cols = row_labels(np.array([10, -1]), 0.99, np.array([0, 1], np.uint8))
    >>> [round(float(x), 4) for x in cols["return_to_goal"]], cols["bootstrap_mask"].tolist()
    ([-9.5618, -100.0], [1, 0])
    """
    steps = np.asarray(steps_to_goal)
    gamma = np.asarray(gamma, dtype=np.float64)
    weight = np.where(steps >= 0, np.exp(steps * np.log(gamma)), 0.0)
    ret = (weight - 1.0) / (1.0 - gamma)
    mask = np.asarray(terminal) == 0
    return dict(zip(LABEL_COLUMNS, (weight.astype(np.float32), ret.astype(np.float32), mask.view(np.uint8))))
