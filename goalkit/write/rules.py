"""The per-strategy rules a stored goal row must satisfy (used by verify)."""

from __future__ import annotations

import numpy as np

# Strategy codes, as fixed in docs/internals.md (never renumbered).
ORIGINAL, FINAL, FUTURE, EPISODE, GEOMETRIC, OTHER_EPISODE = 0, 1, 2, 3, 4, 5


def check_goal_rules(cols: dict, src_lengths: np.ndarray, goal_lengths: np.ndarray):
    """Yield ``(message, violating_rows_mask)`` for each rule.

    Parameters
    ----------
    cols : dict of ndarray
        Stored columns (source_episode, source_step, strategy, goal_episode, goal_step,
        steps_to_goal).
    src_lengths : ndarray
        Transition count T of each row's source episode.
    goal_lengths : ndarray
        Transition count of each row's goal episode (any value where the goal is external).
    """
    s = cols["strategy"]
    ep, t = cols["source_episode"], cols["source_step"]
    ge, j = cols["goal_episode"], cols["goal_step"]
    same = ge == ep
    T = src_lengths
    yield "a final goal must be the last state s_T of the same episode", (s == FINAL) & ~(same & (j == T))
    yield ("a future goal must come from the same episode strictly after the transition (t < j <= T)",
           (s == FUTURE) & ~(same & (j > t) & (j <= T)))
    yield "an episode goal must come from the same episode (0 <= j <= T)", (s == EPISODE) & ~(same & (j >= 0) & (j <= T))
    yield ("a geometric-future goal must come from the same episode after the transition (t < j <= T)",
           (s == GEOMETRIC) & ~(same & (j > t) & (j <= T)))
    yield ("an other-episode goal must come from a different episode (0 <= j <= its length)",
           (s == OTHER_EPISODE) & ~((ge >= 0) & ~same & (j >= 0) & (j <= goal_lengths)))
    yield "an original goal must be external (goal_episode -1)", (s == ORIGINAL) & (ge != -1)
    expect = np.where(same & (j > t), j - t, -1)
    yield ("steps_to_goal must be j - t for later goals of the same episode, -1 otherwise",
           cols["steps_to_goal"] != expect)
