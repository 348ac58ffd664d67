"""Hindsight relabelling: strategies that pick goals for transitions, and their mixture.

See :mod:`goalkit.relabel.strategies` for the conventions of every strategy and for how
to add one (register a function in :data:`STRATEGIES`).
"""

from goalkit.relabel.context import RelabelContext
from goalkit.relabel.mixture import GoalRows, Mixture
from goalkit.relabel.strategies import (CODES, PAST_END, STRATEGIES, StrategyGoals, StrategySpec,
                                        episode, final, future, geometric, geometric_offsets,
                                        locate, original, other_episode, register)
from goalkit.relabel.joined import library, near_miss, neighbour  # registers codes 6-8

__all__ = ["CODES", "PAST_END", "STRATEGIES", "GoalRows", "Mixture", "RelabelContext",
           "StrategyGoals", "StrategySpec", "episode", "final", "future", "geometric",
           "geometric_offsets", "library", "locate", "near_miss", "neighbour", "original", "other_episode",
           "register"]
