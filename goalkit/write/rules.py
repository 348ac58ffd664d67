"""The per-strategy rules a stored goal row must satisfy (used by verify)."""

from __future__ import annotations

import numpy as np

# Strategy codes, as fixed in docs/internals.md (never renumbered).
ORIGINAL, FINAL, FUTURE, EPISODE, GEOMETRIC, OTHER_EPISODE = 0, 1, 2, 3, 4, 5
NEIGHBOUR, LIBRARY, NEAR_MISS = 6, 7, 8


def check_goal_rules(cols: dict, src_lengths: np.ndarray, goal_lengths: np.ndarray, hop_lengths=None):
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
    hop_lengths : ndarray, optional
        Transition count of each row's hop episode (any value where there is none); default
        ``goal_lengths`` (a neighbour's hop episode is its goal episode).
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
    he, hs = cols["hop_episode"], cols["hop_step"]
    join = cols["join_step"] if "join_step" in cols else np.full(len(s), -1, np.int64)
    H = goal_lengths if hop_lengths is None else hop_lengths
    later = (join > t) & (join <= T)
    hopped = s == NEIGHBOUR
    yield ("a neighbour goal must be a state s_m of the hop episode with hop step <= m <= its length, the hop "
           "episode another episode than the source", hopped & ~((he >= 0) & (he != ep) & (ge == he) & (hs >= 0)
                                                                  & (j >= hs) & (j <= goal_lengths)))
    yield ("a neighbour, library or near-miss goal must be joined at a later step of the source episode "
           "(t < join_step <= T)", ((s == NEIGHBOUR) | (s == NEAR_MISS)) & ~later)
    yield ("a library goal must be external, joined at a later step (t < join_step <= T) or unmatched (-1)",
           (s == LIBRARY) & ~((ge == -1) & (j == -1) & (he == -1) & (hs == -1) & (later | (join == -1))))
    found = (s == NEAR_MISS) & (he >= 0)
    yield ("a near-miss goal must be the hop state, in another episode (0 <= step <= its length)",
           found & ~((ge == he) & (j == hs) & (he != ep) & (hs >= 0) & (hs <= H)))
    yield ("a near-miss goal without a hop state must be its join state s_j of the source episode",
           (s == NEAR_MISS) & (he < 0) & ~(same & (j == join) & (hs == -1)))
    plain = (s != NEIGHBOUR) & (s != NEAR_MISS) & (s != LIBRARY)
    yield "only neighbour, library and near-miss goals have a join step", plain & (join != -1)
    yield "only neighbour and near-miss goals have a hop state", plain & ((he != -1) | (hs != -1))
    expect = np.where(same & (j > t), j - t, -1)
    expect = np.where(s == LIBRARY, np.where(join > t, join - t, -1), expect)
    yield ("steps_to_goal must be j - t for later goals of the same episode (join_step - t for matched "
           "library goals), -1 otherwise", cols["steps_to_goal"] != expect)
