"""Which goals the held-out episodes reach from a state: alone, or joined at shared places.

Until the temporal-distance labels of the goal-structure work exist, a path through several
episodes is found by *neighbour joins*: two states of different held-out episodes whose goal
vectors are within the join radius (Euclidean, in goal space) count as the same place. The
graph has one node per held-out state ``(e, t)``; a step edge ``(e, t) -> (e, t + 1)`` costs one
step and a join costs none. Joined states are merged first (connected components of the join
edges, :func:`scipy.sparse.csgraph.connected_components`), then steps-to-goal is the unweighted
shortest path (breadth-first search, :func:`scipy.sparse.csgraph.shortest_path`) from the
pair's state to any state within the join radius of the goal.

A pair's route is ``episode`` when its own episode reaches the goal later (the goal is a later
state of it, steps-to-goal ``j - t``, or a later state of it lies within the join radius of the
goal: the first such step), ``stitched`` when only the joined graph reaches it (horizon: the
graph's steps), ``none`` otherwise (horizon -1). Joins use the ``k`` nearest states of each
state (faiss exact search), so a crowded place may miss joins beyond its ``k``-th neighbour.
A set stores goal vectors of ``s_t+1`` only; the goal vector of an episode's first state is
computed from the stored observation when the set's goal map is a column selection, else that
state is joined to nothing.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from goalkit.goals.neighbours import faiss_threads
from goalkit.suites.strata import EPISODE, NONE, STITCHED

#: Largest (sources x components) block of distances held at once in the search.
BLOCK_CELLS = 20_000_000


@dataclass(frozen=True)
class Graph:
    """The joined graph of held-out states.

    Attributes
    ----------
    node_episode, node_step : ndarray of int64
        The state of each node.
    node_goal : ndarray of float32, shape (n, G)
        phi of each node's state (rows of ``has_goal`` only are meaningful).
    has_goal : ndarray of bool
    component : ndarray of int64
        Join component of each node.
    steps : scipy.sparse.csr_matrix
        Step edges between components.
    joins : int
        Join edges found (pairs of states of different episodes within the radius).
    """

    node_episode: np.ndarray
    node_step: np.ndarray
    node_goal: np.ndarray
    has_goal: np.ndarray
    component: np.ndarray
    steps: object
    joins: int


def _keys(ep, step, span):
    return np.asarray(ep, np.int64) * span + np.asarray(step, np.int64)


def _knn(vectors: np.ndarray, queries: np.ndarray, k: int):
    """Exact k nearest (squared L2 distances, ids) of each query among ``vectors`` (faiss flat)."""
    import faiss

    index = faiss.IndexFlatL2(vectors.shape[1])
    index.add(np.ascontiguousarray(vectors, dtype=np.float32))
    with faiss_threads(1):  # byte-identical whatever the machine's thread count
        d, i = index.search(np.ascontiguousarray(queries, dtype=np.float32), min(k, len(vectors)))
    return d, i


def build_graph(episode, step, next_goal, *, radius: float, k: int = 8, state_goal=None) -> Graph:
    """Build the joined graph from the held-out transitions.

    Parameters
    ----------
    episode, step : array of int64, shape (n,)
        Transition ``(e, t)`` of each held-out transition (duplicates allowed).
    next_goal : array, shape (n, G)
        phi(s_t+1) of each transition.
    state_goal : array, shape (n, G), optional
        phi(s_t) of each transition, when the goal map can be applied to the stored states (a
        column selection); otherwise the first state of an episode is joined to nothing.
    radius : float
        Join radius (Euclidean, goal space).
    k : int
        Neighbours searched per state for joins.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    episode = np.asarray(episode, np.int64)
    step = np.asarray(step, np.int64)
    span = int(step.max(initial=0)) + 2
    first = np.unique(_keys(episode, step, span), return_index=True)[1]
    ep, st, nxt = episode[first], step[first], np.asarray(next_goal, np.float32)[first]
    keys = np.unique(np.concatenate([_keys(ep, st, span), _keys(ep, st + 1, span)]))
    node_episode, node_step = keys // span, keys % span
    n = keys.size
    src = np.searchsorted(keys, _keys(ep, st, span))
    dst = np.searchsorted(keys, _keys(ep, st + 1, span))
    node_goal = np.zeros((n, nxt.shape[1]), np.float32)
    node_goal[dst] = nxt
    has_goal = np.zeros(n, bool)
    if state_goal is not None:
        node_goal[src] = np.asarray(state_goal, np.float32)[first]
        has_goal[src] = True
    has_goal[dst] = True

    with_goal = np.flatnonzero(has_goal)
    joins_a = joins_b = np.zeros(0, np.int64)
    if with_goal.size > 1:
        d2, ids = _knn(node_goal[with_goal], node_goal[with_goal], k + 1)
        a = np.repeat(with_goal, ids.shape[1])
        b = with_goal[np.clip(ids.ravel(), 0, None)]
        keep = (ids.ravel() >= 0) & (np.sqrt(np.maximum(d2.ravel(), 0)) <= radius) & (
            node_episode[a] != node_episode[b])
        joins_a, joins_b = a[keep], b[keep]
    adj = coo_matrix((np.ones(joins_a.size, np.int8), (joins_a, joins_b)), shape=(n, n)).tocsr()
    _, component = connected_components(adj, directed=False)
    component = component.astype(np.int64)
    c = int(component.max(initial=-1)) + 1
    cs, cd = component[src], component[dst]
    keep = cs != cd
    steps = coo_matrix((np.ones(int(keep.sum()), np.float64), (cs[keep], cd[keep])), shape=(c, c)).tocsr()
    steps.sum_duplicates()
    steps.data[:] = 1.0
    pairs = np.unique(np.sort(np.stack([joins_a, joins_b], 1), axis=1), axis=0) if joins_a.size else joins_a
    return Graph(node_episode, node_step, node_goal, has_goal, component, steps, int(len(pairs)))


def classify(graph: Graph, episode, step, goal, steps_to_goal, *, radius: float, k: int = 8):
    """Route and horizon of each (state, goal) pair.

    Parameters
    ----------
    graph : Graph
    episode, step : array of int64, shape (m,)
        The pair's state ``s_t`` of held-out episode ``e``.
    goal : array, shape (m, G)
    steps_to_goal : array of int64, shape (m,)
        The set's steps-to-goal (``j - t`` for a later goal of the same episode, else -1).
    radius : float
        Reach radius around the goal (the join radius).
    k : int
        Nearest states of each goal searched.

    Returns
    -------
    route : ndarray of uint8
        :data:`EPISODE`, :data:`STITCHED` or :data:`NONE`.
    horizon : ndarray of int64
        Steps to the goal (-1 when unreachable; 0 when the state is joined to the goal itself,
        which a suite leaves out).
    """
    from scipy.sparse.csgraph import shortest_path

    episode = np.asarray(episode, np.int64)
    step = np.asarray(step, np.int64)
    stg = np.asarray(steps_to_goal, np.int64)
    m = episode.size
    route = np.full(m, NONE, np.uint8)
    horizon = np.full(m, -1, np.int64)
    if m == 0:
        return route, horizon
    with_goal = np.flatnonzero(graph.has_goal)
    if with_goal.size == 0:
        return route, horizon
    d2, ids = _knn(graph.node_goal[with_goal], np.asarray(goal, np.float32), k)
    near = (ids >= 0) & (np.sqrt(np.maximum(d2, 0)) <= radius)
    targets = with_goal[np.clip(ids, 0, None)]
    # the pair's own episode, later
    own = near & (graph.node_episode[targets] == episode[:, None]) & (graph.node_step[targets] > step[:, None])
    own_h = np.where(own, graph.node_step[targets] - step[:, None], np.iinfo(np.int64).max).min(axis=1)
    by_log = stg > 0
    by_own = ~by_log & own.any(axis=1)
    route[by_log | by_own] = EPISODE
    horizon[by_log] = stg[by_log]
    horizon[by_own] = own_h[by_own]
    # several episodes, joined
    rest = np.flatnonzero(route == NONE)
    if rest.size:
        span = int(max(graph.node_step.max(initial=0), step.max(initial=0))) + 2
        node_keys = _keys(graph.node_episode, graph.node_step, span)
        pos = np.searchsorted(node_keys, _keys(episode[rest], step[rest], span))
        pos = np.clip(pos, 0, node_keys.size - 1)
        known = node_keys[pos] == _keys(episode[rest], step[rest], span)
        rest, pos = rest[known], pos[known]
        src_comp = graph.component[pos]
        tcomp = np.where(near[rest], graph.component[targets[rest]], -1)
        sources, inverse = np.unique(src_comp, return_inverse=True)
        c = graph.steps.shape[0]
        block = max(1, BLOCK_CELLS // max(c, 1))
        best = np.full(rest.size, np.inf)
        for a in range(0, sources.size, block):
            dist = shortest_path(graph.steps, method="D", directed=True, unweighted=True,
                                 indices=sources[a:a + block])
            dist = np.atleast_2d(dist)
            mine = (inverse >= a) & (inverse < a + block)
            rows = dist[inverse[mine] - a]
            tc = tcomp[mine]
            got = np.where(tc >= 0, np.take_along_axis(rows, np.clip(tc, 0, None), axis=1), np.inf)
            best[mine] = got.min(axis=1)
        ok = np.isfinite(best) & (best > 0)
        route[rest[ok]] = STITCHED
        horizon[rest[ok]] = best[ok].astype(np.int64)
        horizon[rest[best == 0]] = 0  # the state already sits at the goal: not a held-out goal (dropped)
    return route, horizon
