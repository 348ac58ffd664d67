"""Settings of the logs' graph and the recipe's ``[graph]`` table (light: no scipy, no faiss).

The graph itself and its searches are in :mod:`goalkit.goals.stategraph`; docs/graph.md.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from goalkit.errors import ParameterError


@dataclass(frozen=True)
class GraphSettings:
    """How the logs' graph is built and searched.

    Parameters
    ----------
    join_radius : float
        Two states of different episodes are joined when their goal vectors are at most this
        far apart (Euclidean). 0 joins identical goal vectors only.
    join_neighbours : int
        Join candidates per state (nearest neighbours asked of the faiss index).
    horizon : int or None
        Searches stop after this many steps; longer paths count as unreachable. None: no bound.
    batch : int
        Targets searched together (memory: the states within ``horizon`` of a batch).
    index_method : str
        faiss index for the joins (see :class:`goalkit.goals.neighbours.IndexSettings`).
    seed : int
        Seed of the faiss index (IVF k-means) when it is approximate.
    """

    join_radius: float = 0.0
    join_neighbours: int = 16
    horizon: int | None = 200
    batch: int = 256
    index_method: str = "auto"
    seed: int = 0

    def __post_init__(self):
        r = self.join_radius
        if isinstance(r, bool) or not isinstance(r, (int, float, np.integer, np.floating)) \
                or not math.isfinite(float(r)) or float(r) < 0:
            raise ParameterError(f"expected a finite number >= 0, got {r!r}", owner="GraphSettings",
                                 parameter="join_radius")
        for name in ("join_neighbours", "batch"):
            _positive_int(getattr(self, name), name)
        if self.horizon is not None:
            _positive_int(self.horizon, "horizon")
        if self.index_method not in ("auto", "exact", "ivf", "hnsw"):
            raise ParameterError(f"expected one of auto, exact, ivf, hnsw, got {self.index_method!r}",
                                 owner="GraphSettings", parameter="index_method")


def _positive_int(v, name):
    if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
        raise ParameterError(f"expected a positive integer, got {v!r}", owner="GraphSettings", parameter=name)


#: Keys of the recipe's ``[graph]`` table.
GRAPH_KEYS = ("join_radius", "join_neighbours", "horizon", "goal_share", "guard_neighbours", "index")


@dataclass(frozen=True)
class GraphSpec:
    """The recipe's ``[graph]`` table: build the logs' graph and label rows with graph distances.

    Parameters
    ----------
    settings : GraphSettings
    goal_share : float
        Share of goal states whose rows get a graph distance (drawn per goal state from the
        build's seed, so a state is in or out whatever the chunking); 1 labels every row with a
        goal from the logs. Rows of guarded ``neighbour`` goals are always labelled.
    guard_neighbours : bool
        Keep a ``neighbour`` goal only when the graph connects the row's next state to it within
        ``horizon`` steps; otherwise the slot falls back to its join state (a future goal).
    """

    settings: GraphSettings = GraphSettings()
    goal_share: float = 1.0
    guard_neighbours: bool = False

    def __post_init__(self):
        g = self.goal_share
        if isinstance(g, bool) or not isinstance(g, (int, float)) or not math.isfinite(float(g)) \
                or not 0.0 <= float(g) <= 1.0:
            raise ParameterError(f"expected a fraction in [0, 1], got {g!r}", owner="GraphSpec",
                                 parameter="goal_share")
        if not isinstance(self.guard_neighbours, bool):
            raise ParameterError(f"expected true or false, got {self.guard_neighbours!r}", owner="GraphSpec",
                                 parameter="guard_neighbours")

    @classmethod
    def from_table(cls, table: dict) -> "GraphSpec":
        """Build from the recipe's ``[graph]`` table (unknown keys are refused by the caller).

        ``horizon = 0`` means no bound.
        """
        unknown = sorted(set(table) - set(GRAPH_KEYS))
        if unknown:
            raise ParameterError(f"unknown key {unknown[0]!r}; valid keys: {', '.join(GRAPH_KEYS)}",
                                 owner="GraphSpec", parameter=unknown[0])
        horizon = table.get("horizon", 200)
        if horizon == 0 and not isinstance(horizon, bool):
            horizon = None
        try:
            settings = GraphSettings(join_radius=table.get("join_radius", 0.0),
                                     join_neighbours=table.get("join_neighbours", 16), horizon=horizon,
                                     index_method=table.get("index", "auto"))
        except ParameterError as exc:
            key = {"index_method": "index"}.get(exc.parameter, exc.parameter)
            raise ParameterError(exc.message, owner="GraphSpec", parameter=key) from None
        return cls(settings=settings, goal_share=table.get("goal_share", 1.0),
                   guard_neighbours=table.get("guard_neighbours", False))

    def describe(self) -> dict:
        """JSON-able description (summary and provenance)."""
        s = self.settings
        return {"join_radius": float(s.join_radius), "join_neighbours": int(s.join_neighbours),
                "horizon": s.horizon, "goal_share": float(self.goal_share),
                "guard_neighbours": self.guard_neighbours, "index": s.index_method}
