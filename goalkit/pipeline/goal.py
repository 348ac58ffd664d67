"""Turn a recipe's ``[goal]`` table into a goal map for a given log."""

from __future__ import annotations

from goalkit.errors import RecipeError
from goalkit.goals import embedding_goal_map
from goalkit.goals.goalmap import IndexGoalMap, goal_map_from_fields


def make_goal_map(spec, source, obs_dim: int, file=None):
    """Return the goal map a recipe asks for.

    Parameters
    ----------
    spec : goalkit.pipeline.recipe.GoalSpec
        The recipe's goal table.
    source : LogSource
        The opened logs (for the named fields).
    obs_dim : int
        Observation width, to check column numbers.
    file : str, optional
        Recipe file, for messages.
    """
    if spec.fields:
        return goal_map_from_fields(spec.fields, source.fields, file=file)
    if spec.indices:
        bad = [i for i in spec.indices if i >= obs_dim]
        if bad:
            raise RecipeError(f"goal column {bad[0]} is out of range: observations have {obs_dim} columns "
                              f"(0 .. {obs_dim - 1})", file=file, key="goal.indices")
        return IndexGoalMap(tuple(spec.indices))

    return embedding_goal_map(spec.embedding, source, file=file)
