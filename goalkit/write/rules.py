"""The per-strategy rules a stored goal row must satisfy (used by verify).

The rules of each strategy are its entry's ``rules`` in the strategy table
(:data:`goalkit.relabel.STRATEGIES`); the rules shared by every strategy (join step, hop state,
``steps_to_goal``) follow from the entries' flags. Nothing here names a strategy.
"""

from __future__ import annotations

import numpy as np

from goalkit.relabel.strategies import STRATEGIES, StoredRows


def _names(specs, last: str) -> str:
    names = [s.name.replace("_", "-") for s in specs]
    return names[0] if len(names) == 1 else f"{', '.join(names[:-1])} {last} {names[-1]}"


def _codes(specs) -> list[int]:
    return [s.code for s in specs]


def _among(s, codes) -> np.ndarray:
    """``np.isin(s, codes)`` for strategy codes (a table lookup when they are bytes)."""
    if s.dtype == np.uint8:
        table = np.zeros(256, bool)
        table[codes] = True
        return table[s]
    return np.isin(s, codes)


def check_goal_rules(cols: dict, src_lengths: np.ndarray, goal_lengths: np.ndarray, hop_lengths=None):
    """Yield ``(message, violating_rows_mask)`` for each rule.

    Parameters
    ----------
    cols : dict of ndarray
        Stored columns (source_episode, source_step, strategy, goal_episode, goal_step,
        hop_episode, hop_step, join_step, steps_to_goal).
    src_lengths : ndarray
        Transition count T of each row's source episode.
    goal_lengths : ndarray
        Transition count of each row's goal episode (any value where the goal is external).
    hop_lengths : ndarray, optional
        Transition count of each row's hop episode (any value where there is none); default
        ``goal_lengths`` (a neighbour's hop episode is its goal episode).
    """
    s = cols["strategy"]
    join = cols["join_step"] if "join_step" in cols else np.full(len(s), -1, np.int64)
    rows = StoredRows(strategy=s, ep=cols["source_episode"], t=cols["source_step"], ge=cols["goal_episode"],
                      j=cols["goal_step"], he=cols["hop_episode"], hs=cols["hop_step"], join=join,
                      T=src_lengths, goal_T=goal_lengths,
                      hop_T=goal_lengths if hop_lengths is None else hop_lengths)
    table = sorted(STRATEGIES.values(), key=lambda spec: spec.code)
    yield "strategy code not in the strategy table", ~_among(s, _codes(table))
    for spec in table:
        own = s == spec.code
        anyone = own.any()   # a rule with no row of its strategy is broken by none (not evaluated)
        for message, ok in spec.rules:
            yield message, (own & ~ok(rows)) if anyone else own
    later = [spec for spec in table if spec.join == "later"]
    if later:
        yield (f"a {_names(later, 'or')} goal must be joined at a later step of the source episode "
               f"(t < join_step <= T)", _among(s, _codes(later)) & ~rows.later_join)
    joined = [spec for spec in table if spec.join]
    plain = ~_among(s, _codes(joined))
    yield f"only {_names(joined, 'and')} goals have a join step", plain & (join != -1)
    hops = [spec for spec in table if spec.hops]
    yield (f"only {_names(hops, 'and')} goals have a hop state",
           plain & ((rows.he != -1) | (rows.hs != -1)))
    expect = np.where(rows.same & (rows.j > rows.t), rows.j - rows.t, -1)
    from_join = [spec for spec in table if spec.steps_from_join]
    expect = np.where(_among(s, _codes(from_join)), np.where(join > rows.t, join - rows.t, -1), expect)
    extra = f" (join_step - t for matched {_names(from_join, 'and')} goals)" if from_join else ""
    yield (f"steps_to_goal must be j - t for later goals of the same episode{extra}, -1 otherwise",
           cols["steps_to_goal"] != expect)
