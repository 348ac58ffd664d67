"""Goal maps: phi takes states to goal vectors.

A goal map is called with an EpisodeSet and state rows of it (see
:mod:`goalkit.logs.episodes` for the row convention) and returns float64 goal vectors.
Taking rows rather than observations lets a map read observations, camera frames, or
an array precomputed per logged state, through one interface.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Protocol, Sequence

import numpy as np

from goalkit.errors import RecipeError
from goalkit.logs.episodes import EpisodeSet


class GoalMap(Protocol):
    """Protocol of every goal map.

    Attributes
    ----------
    dim : int
        Length of the goal vectors.
    """

    dim: int

    def __call__(self, episodes: EpisodeSet, rows: np.ndarray) -> np.ndarray:
        """Return goal vectors, float64 of shape (len(rows), dim), of the given state rows."""
        ...

    def describe(self) -> dict:
        """Return a JSON-able description for provenance."""
        ...


@dataclass(frozen=True)
class IndexGoalMap:
    """Goal = chosen observation dimensions.

    Parameters
    ----------
    indices : sequence of int
        Observation columns making up the goal, in order.
    names : sequence of str, optional
        Field names the indices came from (provenance only).

    Examples
    --------
    >>> import numpy as np
    >>> from goalkit.logs.episodes import EpisodeSet
    >>> ep = EpisodeSet(observations=np.arange(12.).reshape(3, 4), actions=np.zeros((2, 1)),
    ...                 offsets=np.array([0, 2]), episode_ids=np.array([0]))
    >>> IndexGoalMap((1, 3))(ep, np.array([2]))
    array([[ 9., 11.]])
    """

    indices: tuple[int, ...]
    names: tuple[str, ...] = ()

    @property
    def dim(self) -> int:
        return len(self.indices)

    def __call__(self, episodes: EpisodeSet, rows: np.ndarray) -> np.ndarray:
        idx = np.asarray(self.indices, dtype=np.int64)
        return np.asarray(episodes.observations[np.asarray(rows, dtype=np.int64)][:, idx], dtype=np.float64)

    def describe(self) -> dict:
        return {"kind": "indices", "indices": list(self.indices), "fields": list(self.names)}


def goal_map_from_fields(names: Sequence[str], fields: Mapping[str, tuple[int, int]], *,
                         file=None) -> IndexGoalMap:
    """Build an IndexGoalMap from named observation fields.

    Parameters
    ----------
    names : sequence of str
        Field names, in the order their columns appear in the goal.
    fields : mapping of str to (int, int)
        The log's named fields and their column ranges.
    file : str, optional
        Recipe file, for the error message.

    Raises
    ------
    RecipeError
        If a name is not a field of the log.
    """
    idx: list[int] = []
    for name in names:
        if name not in fields:
            raise RecipeError(f"goal field '{name}' is not an observation field of the logs; "
                              f"fields are: {', '.join(fields) or '(none: the layout names no fields)'}",
                              file=file, key="goal.fields")
        a, b = fields[name]
        idx.extend(range(a, b))
    return IndexGoalMap(tuple(idx), tuple(names))
