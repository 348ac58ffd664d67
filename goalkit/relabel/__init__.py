"""Hindsight relabelling: strategies that pick goals for transitions, and their mixture.

See :mod:`goalkit.relabel.strategies` for the conventions of every strategy and for how
to add one (one function plus one entry in the strategy table, :func:`register`).
"""

from goalkit.relabel.context import RelabelContext
from goalkit.relabel.mixture import GoalRows, Mixture
from goalkit.relabel.strategies import (CODES, PAST_END, STRATEGIES, StoredRows, StrategyGoals, StrategySpec,
                                        episode, final, future, geometric, geometric_offsets,
                                        locate, original, other_episode, register, strategy_names,
                                        unregister)
from goalkit.relabel.search_strategies import library, near_miss, neighbour  # registers codes 6-8

__all__ = ["CODES", "PAST_END", "STRATEGIES", "GoalRows", "Mixture", "RelabelContext",
           "StoredRows", "StrategyGoals", "StrategySpec", "episode", "final", "future", "geometric",
           "geometric_offsets", "library", "locate", "near_miss", "neighbour", "original", "other_episode",
           "register", "strategy_names", "unregister"]
