"""Per-row rules of a built set, re-stated from docs/relabel.md and docs/reward.md.

Each function yields ``(rule name, message, violating rows mask)`` for a block of rows.
"""

from __future__ import annotations

import numpy as np

from goalkit.audit.distances import rule_distance

ORIGINAL, FINAL, FUTURE, EPISODE, GEOMETRIC, OTHER, NEIGHBOUR, LIBRARY, NEAR_MISS = range(9)


def among(codes_of_rows, codes) -> np.ndarray:
    """``np.isin(codes_of_rows, codes)``, by a table of the 256 byte values when every code is one."""
    x = np.asarray(codes_of_rows)
    if x.size and x.dtype.kind in "iu" and int(x.min()) >= 0 and int(x.max()) < 256:
        table = np.zeros(256, bool)
        table[list(codes)] = True
        return table[x]
    return np.isin(x, list(codes))


def address_rules(c: dict, T, T_goal, same_split, rc):
    """Goal-address rules per strategy code.

    Parameters
    ----------
    c : dict of ndarray
        Stored index columns of the block.
    T : ndarray
        Transition count of each row's own episode (from the logs).
    T_goal : ndarray
        Transition count of each row's goal (or hop) episode; any value where there is none.
    same_split : ndarray of bool
        The goal (or hop) episode is in the row's split.
    rc : AuditRecipe
    """
    s = c["strategy"].astype(np.int64)
    ep, t, slot = c["source_episode"], c["source_step"], c["slot"]
    ge, j = c["goal_episode"], c["goal_step"]
    he, hs, join = c["hop_episode"], c["hop_step"], c["join_step"]
    steps = c["steps_to_goal"]
    own = ge == ep
    no_hop = (he == -1) & (hs == -1)
    no_join = join == -1
    external = (ge == -1) & (j == -1)
    later_join = (join > t) & (join <= T)
    yield "mixture", "strategy code not among the recipe's positive weights", ~among(s, list(rc.weights))
    most = max([rc.goals_per_transition, *(rc.source_goals or {}).values()])   # per source: run.py checks each
    yield "slot", f"slot outside 0 .. {most - 1}", (slot < 0) | (slot >= most)
    yield "source step", "source step outside 0 .. T-1 of its episode", (t < 0) | (t >= T)
    # each rule as a function, evaluated only when some row has its code (else no row breaks it)
    rules = {
        ORIGINAL: ("original: external goal, no hop, join or steps-to-goal",
                   lambda: external & no_hop & no_join & (steps == -1)),
        FINAL: ("final: goal is s_T of the own episode, steps-to-goal T - t",
                lambda: own & (j == T) & no_hop & no_join & (steps == T - t)),
        FUTURE: ("future: goal s_j of the own episode with t < j <= T, steps-to-goal j - t",
                 lambda: own & (j > t) & (j <= T) & no_hop & no_join & (steps == j - t)),
        EPISODE: ("episode: goal s_j of the own episode with 0 <= j <= T, steps-to-goal j - t if j > t else -1",
                  lambda: own & (j >= 0) & (j <= T) & no_hop & no_join & (steps == np.where(j > t, j - t, -1))),
        GEOMETRIC: ("geometric: goal s_j of the own episode with t < j <= T, steps-to-goal j - t",
                    lambda: own & (j > t) & (j <= T) & no_hop & no_join & (steps == j - t)),
        OTHER: ("other_episode: goal s_j of another episode of the same split, 0 <= j <= T', steps-to-goal -1",
                lambda: (ge >= 0) & ~own & same_split & (j >= 0) & (j <= T_goal) & no_hop & no_join & (steps == -1)),
        NEIGHBOUR: ("neighbour: goal s_m of the hop episode (another of the same split), hop step <= m <= T', "
                    "joined at t < join <= T, steps-to-goal -1; guarded ([graph] guard_neighbours), a dropped "
                    "goal is the join state itself (steps j - t)",
                    lambda: later_join & np.where(he >= 0, (ge == he) & (he != ep) & same_split & (hs >= 0)
                                                  & (j >= hs) & (j <= T_goal) & (steps == -1),
                                                  rc.guard_neighbours & own & (j == join) & (hs == -1)
                                                  & (steps == j - t))),
        LIBRARY: ("library: external goal, no hop, joined at t < join <= T (steps join - t) or unmatched (-1)",
                  lambda: external & no_hop & ((later_join & (steps == join - t)) | (no_join & (steps == -1)))),
        NEAR_MISS: ("near_miss: the hop state of another episode of the same split joined at t < join <= T "
                    "(steps -1), or without a hop the join state itself (steps j - t)",
                    lambda: later_join & np.where(he >= 0, (ge == he) & (j == hs) & (he != ep) & same_split
                                                  & (j >= 0) & (j <= T_goal) & (steps == -1),
                                                  own & (j == join) & (hs == -1) & (steps == j - t))),
    }
    for code, (message, ok) in rules.items():
        mine = s == code
        yield message.split(":")[0], message, (mine & ~ok()) if mine.any() else mine


def reward_rules(c: dict, achieved, goal, rc):
    """Distance -> reached -> reward -> terminal from the recipe's reward table.

    ``achieved`` is phi(s_t+1) from the logs (goal dtype), ``goal`` the stored goal vectors.
    """
    box = rc.distance == "box"
    d = rule_distance(rc.distance, achieved, goal, weights=rc.weights_dim,
                      threshold=rc.threshold if box else None, mask=c.get("goal_mask"),
                      lower=rc.lower, upper=rc.upper)
    thr = 1.0 if box else float(rc.threshold)
    scale = np.maximum(1.0, np.where(np.isfinite(d), np.abs(d), 1.0))
    stored_d = c["goal_distance"].astype(np.float64)
    yield "goal_distance", "goal_distance is not the documented distance of phi(s_t+1) and g", \
        ~((np.abs(stored_d - d) <= 1e-6 * scale) | (stored_d == d))
    reached = d <= thr if rc.inclusive else d < thr
    # rows whose distance lies within rounding of the threshold (but not on it) may go either way
    unsure = (np.abs(d - thr) <= 1e-9 * max(1.0, thr)) & (d != thr)
    stored_reached = c["reached"].astype(bool)
    yield "reached", ("reached is not d <= threshold" if rc.inclusive else "reached is not d < threshold"), \
        (stored_reached != reached) & ~unsure
    form = rc.form
    if form == "sparse":
        expect, tol = stored_reached.astype(np.float64), 0.0
    elif form == "sparse-negative":
        expect, tol = stored_reached.astype(np.float64) - 1.0, 0.0
    elif form == "negative-distance":
        expect, tol = -d, 1e-6 * scale
    elif form == "clipped-negative-distance":
        expect, tol = -np.minimum(d, rc.clip), 1e-6 * scale
    else:
        raise ValueError(f"unknown reward form {form!r}")
    yield "reward", f"reward is not the {form} form of the distance and reached flag", \
        ~(np.abs(c["reward"].astype(np.float64) - expect) <= tol)
    terminal = stored_reached & rc.end_on_reach
    yield "terminal", ("terminal is not the reached flag (end_on_reach = true)" if rc.end_on_reach
                       else "terminal must be 0 (end_on_reach = false)"), c["terminal"].astype(bool) != terminal


def label_rules(c: dict, rc):
    """The training labels (docs/dataset.md, "Training labels") from steps_to_goal and terminal.

    ``d = steps_to_goal``, ``g`` the recipe's ``[relabel] gamma``: ``discount_weight`` is
    ``g**d`` and ``return_to_goal`` is the sum of ``-g**k`` for ``k < d`` when ``d >= 1``; 0 and
    ``-1 / (1 - g)`` when ``d`` is -1. ``bootstrap_mask`` is 1 unless the row is terminal.
    Stored as float32, so compared within float32 rounding.
    """
    d = c["steps_to_goal"]
    g = float(rc.gamma)
    known = d >= 1
    weight = np.where(known, g ** np.where(known, d, 0).astype(np.float64), 0.0)
    # the return as a geometric series, written out rather than taken from the builder
    ret = np.where(known, -(1.0 - weight) / (1.0 - g), -1.0 / (1.0 - g))
    tol = 4e-7 * np.maximum(1.0, np.abs(ret))
    yield "discount_weight", "discount_weight is not gamma**steps_to_goal (0 without a path)", \
        ~(np.abs(c["discount_weight"].astype(np.float64) - weight) <= 4e-7)
    yield "return_to_goal", "return_to_goal is not -(1 - gamma**d) / (1 - gamma) (-1 / (1 - gamma) without a path)", \
        ~(np.abs(c["return_to_goal"].astype(np.float64) - ret) <= tol)
    yield "bootstrap_mask", "bootstrap_mask is not 1 - terminal", \
        c["bootstrap_mask"].astype(np.int64) != 1 - c["terminal"].astype(np.int64)
