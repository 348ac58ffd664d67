"""Goal maps (state -> goal vector), embeddings and the neighbour index."""

from goalkit.goals.goalmap import GoalMap, IndexGoalMap, goal_map_from_fields

__all__ = ["GoalMap", "IndexGoalMap", "goal_map_from_fields"]
