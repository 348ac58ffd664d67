"""The audit's own check of the ``graph_steps`` column: a sample of rows, searched again here.

Written apart from :mod:`goalkit.goals.stategraph`: the graph is rebuilt from the logs with
scipy (logged transitions one way; every pair of states of different episodes whose goal
vectors lie within the join radius, found by ``scipy.spatial.cKDTree.query_pairs``, both ways),
and distances are searched *forwards* from each sampled row's next state with
``scipy.sparse.csgraph.dijkstra(unweighted=True, limit=horizon)`` (the builder searches
backwards from goal states with its own breadth-first search).

The builder joins at most ``join_neighbours`` nearest states per state, so its graph is a
subgraph of the one rebuilt here: a stored finite distance may never be shorter than the one
found here, and when no state has more than ``join_neighbours + 1`` states within the radius
(so no join was left out) and the builder's index was exact, the two must be equal.
"""

from __future__ import annotations

import numpy as np

#: Rows checked per audit (spread over the blocks read).
SAMPLE_ROWS = 200
#: Builder's exact-search limit of ``index = "auto"`` (docs/recipe.md, [graph] index).
EXACT_BELOW = 50_000


class GraphAudit:
    """Collect sampled rows block by block, then check them against an own search.

    Parameters
    ----------
    logs : the audit's reopened logs (ids, lengths, source, goal_map, goal_dtype)
    graph : dict
        The stored recipe's ``[graph]`` table.
    """

    def __init__(self, logs, graph: dict):
        self.logs = logs
        self.radius = float(graph.get("join_radius", 0.0))
        self.k = int(graph.get("join_neighbours", 16))
        horizon = int(graph.get("horizon", 200))
        self.horizon = None if horizon == 0 else horizon
        self.index = str(graph.get("index", "auto"))
        self.rows: list[tuple] = []
        self.missing = False

    def add(self, split, row0, c: dict, graph_steps) -> None:
        """Keep a few computed rows of one block (the first ones with a stored graph distance)."""
        if graph_steps is None:
            self.missing = True
            return
        room = SAMPLE_ROWS - len(self.rows)
        if room <= 0:
            return
        picked = np.flatnonzero((np.asarray(graph_steps) != -1) & (c["goal_episode"] >= 0))[:max(1, min(room, 8))]
        for i in picked.tolist():
            self.rows.append((split, row0 + i, int(c["source_episode"][i]), int(c["source_step"][i]),
                              int(c["goal_episode"][i]), int(c["goal_step"][i]), int(graph_steps[i])))

    def _states(self):
        logs = self.logs
        parts = []
        step = 256
        for a in range(0, len(logs.ids), step):
            chunk = logs.source.read(a, min(a + step, len(logs.ids)))
            n = chunk.observations.shape[0]
            parts.append(np.asarray(logs.goal_map(chunk, np.arange(n))).astype(logs.goal_dtype))
        return np.concatenate(parts).astype(np.float64)

    def failures(self) -> list[str]:
        """Messages for rows whose stored distance the own search contradicts."""
        if self.missing:
            return ["the recipe has a [graph] table but the set has no graph_steps column"]
        if not self.rows:
            return []
        # scipy's graph and tree modules, imported here: only a set with a [graph] table needs
        # them, and importing them takes a fifth of a second that every verify would pay
        import scipy.sparse as sp
        from scipy.sparse.csgraph import dijkstra
        from scipy.spatial import cKDTree

        logs = self.logs
        x = self._states()
        lengths = logs.lengths
        first = np.concatenate([[0], np.cumsum(lengths + 1)[:-1]]).astype(np.int64)
        ep_of = np.repeat(np.arange(len(lengths)), lengths + 1)
        n = len(x)
        tails = np.concatenate([np.arange(f, f + L) for f, L in zip(first.tolist(), lengths.tolist())]) \
            if len(lengths) else np.zeros(0, np.int64)
        tree = cKDTree(x)
        pairs = tree.query_pairs(self.radius, output_type="ndarray")
        pairs = pairs[ep_of[pairs[:, 0]] != ep_of[pairs[:, 1]]] if len(pairs) else np.zeros((0, 2), np.int64)
        rows = np.concatenate([tails, pairs[:, 0], pairs[:, 1]])
        cols = np.concatenate([tails + 1, pairs[:, 1], pairs[:, 0]])
        g = sp.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(n, n))
        counts = np.asarray([len(v) for v in tree.query_ball_point(x, self.radius)]) if n else np.zeros(0)
        exact = self.index == "exact" or (self.index == "auto" and n <= EXACT_BELOW)
        must_equal = exact and (counts.max(initial=0) <= self.k + 1)
        node = lambda e, s: first[np.searchsorted(logs.ids, e)] + s  # noqa: E731
        out = []
        limit = np.inf if self.horizon is None else self.horizon
        for b in range(0, len(self.rows), 16):
            batch = self.rows[b:b + 16]
            src = np.array([node(r[2], r[3] + 1) for r in batch])
            tgt = np.array([node(r[4], r[5]) for r in batch])
            d = dijkstra(g, directed=True, indices=src, unweighted=True, limit=limit)[np.arange(len(batch)), tgt]
            own = np.where(np.isinf(d), -2, d).astype(np.int64)
            for r, o in zip(batch, own.tolist()):
                stored = r[6]
                bad = (stored >= 0 and (o < 0 or o > stored)) or (must_equal and stored != o)
                if bad:
                    out.append(f"{r[0]} row {r[1]} (episode {r[2]} step {r[3]}): graph_steps {stored}, the audit's "
                               f"own search finds {o if o >= 0 else 'no path within the horizon'}")
        if out:
            return [f"graph_steps contradicted by the audit's own search in {len(out)} of {len(self.rows)} "
                    f"sampled rows; first: {out[0]}"]
        return []
