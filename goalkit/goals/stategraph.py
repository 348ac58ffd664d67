"""The logs' own graph: logged states as nodes, logged transitions and cross-episode joins as edges.

Searching over the replay buffer (Eysenbach et al., 2019, "Search on the Replay Buffer",
NeurIPS) plans over a graph of stored states; here the same graph gives a *label*: the number
of steps the logs show between a row's next state and its goal state.

Nodes and edges
---------------
Node ``i`` is global state row ``i`` (state ``s`` of kept episode position ``p`` is row
``transition_offsets[p] + p + s``, as in :meth:`goalkit.pipeline.plan.BuildPlan.global_state_rows`).
Edges, all of cost 1 (a join counts as one step):

- every logged transition ``s_t -> s_t+1`` (directed: the logs show it one way only);
- joins: ``u <-> v`` (both directions) for states of *different* episodes whose goal vectors lie
  within ``join_radius`` of each other (Euclidean, in goal space). Candidates come from the
  faiss neighbour index of :mod:`goalkit.goals.neighbours` (``join_neighbours`` nearest per
  state), so a state joins at most ``join_neighbours`` others, and with an approximate index a
  join can be missed: the graph distances are then upper bounds of the exact ones.

Distances, bounded
------------------
:meth:`StateGraph.distances` answers pairs (source, target) with breadth-first searches run
backwards from the distinct targets, many targets at once, each stopped after ``horizon``
levels. Memory grows with the number of states within ``horizon`` steps of a batch of
targets, never with the size of the logs (no dense row of length N per target). A pair with
no path of at most ``horizon`` steps gets :data:`UNREACHABLE`; with an unbounded horizon
(``horizon=None``) that means no path at all.
"""

from __future__ import annotations

import numpy as np

from goalkit import rng
from goalkit.goals.neighbours import IndexSettings, build_index
from goalkit.graphconfig import GRAPH_KEYS, GraphSettings, GraphSpec

__all__ = ["UNREACHABLE", "NOT_COMPUTED", "GRAPH_KEYS", "GraphSettings", "GraphSpec", "StateGraph",
           "graph_steps", "identical_joins", "join_edges", "state_episodes", "transition_edges"]

#: Graph distance column value: no path of at most ``horizon`` steps.
UNREACHABLE = -2
#: Graph distance column value: not computed (graph off, external goal, row not sampled).
NOT_COMPUTED = -1


def transition_edges(transition_offsets) -> tuple[np.ndarray, np.ndarray]:
    """The logged transitions as (tail, head) global state rows, in state order.

    Parameters
    ----------
    transition_offsets : array_like of int64, shape (E + 1,)
        Transition offsets of the episodes (episode ``p`` has transitions
        ``offsets[p] .. offsets[p+1]-1``).
    """
    off = np.asarray(transition_offsets, dtype=np.int64)
    lengths = np.diff(off)
    ep = np.repeat(np.arange(len(lengths), dtype=np.int64), lengths)
    tail = np.arange(int(off[-1]), dtype=np.int64) + ep  # transition t of episode p: state row t + p
    return tail, tail + 1


def state_episodes(transition_offsets) -> np.ndarray:
    """Episode position of every global state row."""
    lengths = np.diff(np.asarray(transition_offsets, dtype=np.int64)) + 1
    return np.repeat(np.arange(len(lengths), dtype=np.int64), lengths)


def join_edges(goal_vectors, transition_offsets, settings: GraphSettings) -> tuple[np.ndarray, np.ndarray]:
    """Joins between states of different episodes within ``settings.join_radius`` (each pair once, u < v)."""
    x = np.ascontiguousarray(goal_vectors, dtype=np.float32)
    n = x.shape[0]
    k = min(int(settings.join_neighbours) + 1, n)
    if n < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    index = build_index(x, IndexSettings(method=settings.index_method, k=k, seed=settings.seed,
                                         recall_queries=min(1000, n)))
    ep = state_episodes(transition_offsets)
    u_parts, v_parts = [], []
    step = 65536
    for lo in range(0, n, step):  # chunks of queries: memory O(step * k)
        d, ids = index.search(x[lo:lo + step], k)
        u = np.repeat(np.arange(lo, min(lo + step, n), dtype=np.int64), k)
        v = ids.ravel()
        keep = (v >= 0) & (d.ravel() <= float(settings.join_radius))
        u, v = u[keep], v[keep]
        keep = ep[u] != ep[v]
        u_parts.append(u[keep])
        v_parts.append(v[keep])
    u = np.concatenate(u_parts)
    v = np.concatenate(v_parts)
    lo_, hi_ = np.minimum(u, v), np.maximum(u, v)
    pairs = np.unique(lo_ * n + hi_)
    return pairs // n, pairs % n


def identical_joins(goal_vectors, transition_offsets, neighbours: int) -> tuple[np.ndarray, np.ndarray]:
    """Joins between states of different episodes with identical goal vectors (each pair once, u < v).

    What :func:`join_edges` looks for with ``join_radius = 0``, found exactly by sorting the
    vectors (as float32, the precision of the index; -0.0 equals 0.0) instead of searching an
    index. As there, a state joins at most ``neighbours`` others: the members of a set of
    identical states are taken in row order, and each joins the first ``neighbours + 1`` of
    its set (itself and states of its own episode left out).
    """
    x = np.ascontiguousarray(np.asarray(goal_vectors, dtype=np.float32) + np.float32(0.0))
    n = x.shape[0]
    empty = np.zeros(0, np.int64), np.zeros(0, np.int64)
    if n < 2:
        return empty
    rows_as_bytes = x.view(np.dtype((np.void, x.dtype.itemsize * x.shape[1]))).reshape(n)
    _, inv, size = np.unique(rows_as_bytes, return_inverse=True, return_counts=True)
    inv = inv.reshape(-1)
    shared = np.flatnonzero(size[inv] > 1)
    if not shared.size:
        return empty
    order = shared[np.argsort(inv[shared], kind="stable")]      # sets together, rows ascending
    set_of = inv[order]
    first = np.r_[0, np.flatnonzero(set_of[1:] != set_of[:-1]) + 1]
    start = np.repeat(first, np.diff(np.r_[first, order.size]))  # where each member's set begins
    take = np.minimum(size[set_of], int(neighbours) + 1)          # partners: the set's first `take`
    u = np.repeat(order, take)
    j = np.arange(int(take.sum()), dtype=np.int64) - np.repeat(np.cumsum(take) - take, take)
    v = order[np.repeat(start, take) + j]
    ep = state_episodes(transition_offsets)
    keep = ep[u] != ep[v]
    u, v = u[keep], v[keep]
    pairs = np.unique(np.minimum(u, v) * n + np.maximum(u, v))
    return pairs // n, pairs % n


class StateGraph:
    """The logs' graph, kept as compressed sparse rows of its reversed edges.

    Create with :meth:`from_logs` (or directly from edges). Attributes end in ``_``.

    Attributes
    ----------
    n_states_ : int
    n_transitions_ : int
        Logged-transition edges.
    n_joins_ : int
        Join pairs (each gives two directed edges).
    horizon_ : int or None
    """

    def __init__(self, n_states: int, tails, heads, n_joins: int = 0, horizon: int | None = 200,
                 batch: int = 256, n_transitions: int | None = None, episode_ids=None, transition_offsets=None):
        tails = np.asarray(tails, dtype=np.int64)
        heads = np.asarray(heads, dtype=np.int64)
        self.n_states_ = int(n_states)
        self.n_joins_ = int(n_joins)
        self.n_transitions_ = int(len(tails) - 2 * n_joins if n_transitions is None else n_transitions)
        self.horizon_ = horizon
        self.batch_ = int(batch)
        self.episode_ids_ = None if episode_ids is None else np.asarray(episode_ids, dtype=np.int64)
        self.transition_offsets_ = None if transition_offsets is None else np.asarray(transition_offsets, np.int64)
        # reversed edges (head -> tail) as CSR, duplicates removed: a backward search from a target
        order = np.lexsort((tails, heads))
        h, t = heads[order], tails[order]
        if len(h):
            first = np.ones(len(h), bool)
            first[1:] = (h[1:] != h[:-1]) | (t[1:] != t[:-1])
            h, t = h[first], t[first]
        self.rev_indptr_ = np.zeros(self.n_states_ + 1, np.int64)
        np.cumsum(np.bincount(h, minlength=self.n_states_), out=self.rev_indptr_[1:])
        self.rev_indices_ = t

    @classmethod
    def from_logs(cls, goal_vectors, transition_offsets, settings: GraphSettings | None = None,
                  episode_ids=None) -> "StateGraph":
        """Build the graph of logged states.

        Parameters
        ----------
        goal_vectors : array_like, shape (N, G)
            phi of every logged state, in global state row order.
        transition_offsets : array_like of int64, shape (E + 1,)
        settings : GraphSettings, optional
        episode_ids : array_like of int64, shape (E,), optional
            Ids of the episodes (increasing), for :meth:`node_of`; default ``0 .. E-1``.
        """
        s = settings or GraphSettings()
        x = np.asarray(goal_vectors)
        tail, head = transition_edges(transition_offsets)
        if x.shape[0] != len(tail) + len(np.asarray(transition_offsets)) - 1:
            raise ValueError(f"expected one goal vector per state ({len(tail) + len(transition_offsets) - 1}), "
                             f"got {x.shape[0]}")
        ju, jv = join_edges(x, transition_offsets, s)
        tails = np.concatenate([tail, ju, jv])
        heads = np.concatenate([head, jv, ju])
        off = np.asarray(transition_offsets, dtype=np.int64)
        ids = np.arange(len(off) - 1, dtype=np.int64) if episode_ids is None else episode_ids
        return cls(x.shape[0], tails, heads, n_joins=len(ju), horizon=s.horizon, batch=s.batch,
                   n_transitions=len(tail), episode_ids=ids, transition_offsets=off)

    def node_of(self, episode_ids, steps) -> np.ndarray:
        """Global state row (node) of state ``steps`` of each episode id."""
        pos = np.searchsorted(self.episode_ids_, np.asarray(episode_ids, dtype=np.int64))
        return self.transition_offsets_[pos] + pos + np.asarray(steps, dtype=np.int64)

    def describe(self) -> dict:
        """Sizes of the graph (summary and provenance)."""
        return {"states": self.n_states_, "transitions": self.n_transitions_, "join_pairs": self.n_joins_,
                "horizon": self.horizon_}

    def csr(self):
        """The forward graph as a scipy CSR matrix of ones (row: tail, column: head)."""
        import scipy.sparse as sp   # noqa: PLC0415  scipy loads only when a graph is built

        n = self.n_states_
        rev = sp.csr_matrix((np.ones(len(self.rev_indices_), np.int8), self.rev_indices_, self.rev_indptr_),
                            shape=(n, n))
        return rev.T.tocsr()

    def distances(self, sources, targets) -> np.ndarray:
        """Steps of the shortest path from each source state to its target state.

        Parameters
        ----------
        sources, targets : array_like of int64, shape (M,)
            Global state rows.

        Returns
        -------
        ndarray of int64, shape (M,)
            Path lengths (0 when source is target); :data:`UNREACHABLE` when no path of at most
            ``horizon`` steps exists.

        Notes
        -----
        Exact breadth-first search, run backwards from the distinct targets in batches of
        ``batch``; the result does not depend on the batching or on the order of the pairs.
        """
        src = np.asarray(sources, dtype=np.int64)
        tgt = np.asarray(targets, dtype=np.int64)
        out = np.full(len(src), UNREACHABLE, np.int64)
        if not len(src):
            return out
        uniq, inv = np.unique(tgt, return_inverse=True)
        order = np.argsort(inv, kind="stable")
        starts = np.append(np.arange(0, len(uniq), self.batch_), len(uniq))
        bounds = np.searchsorted(inv[order], starts)
        for b, lo in enumerate(range(0, len(uniq), self.batch_)):
            rows = order[bounds[b]:bounds[b + 1]]
            out[rows] = self._batch(uniq[lo:lo + self.batch_], inv[rows] - lo, src[rows])
        return out

    def _batch(self, targets, which, sources) -> np.ndarray:
        """Backward BFS from ``targets`` at once; distance of (sources[i] -> targets[which[i]])."""
        n = np.int64(self.n_states_)
        want = np.unique(which.astype(np.int64) * n + sources)
        found_keys = [np.arange(len(targets), dtype=np.int64) * n + targets]
        found_levels = [np.zeros(len(targets), np.int64)]
        visited = np.sort(found_keys[0])
        frontier = visited
        remaining = want[~_member(want, visited)]
        level = 0
        indptr, indices = self.rev_indptr_, self.rev_indices_
        while len(frontier) and len(remaining) and (self.horizon_ is None or level < self.horizon_):
            level += 1
            nodes = frontier % n
            which_t = frontier // n
            starts = indptr[nodes]
            counts = indptr[nodes + 1] - starts
            total = int(counts.sum())
            if not total:
                break
            ends = np.cumsum(counts)
            pos = np.arange(total, dtype=np.int64) + np.repeat(starts - (ends - counts), counts)
            cand = np.unique(np.repeat(which_t, counts) * n + indices[pos])
            new = cand[~_member(cand, visited)]
            if not len(new):
                break
            found_keys.append(new)
            found_levels.append(np.full(len(new), level, np.int64))
            visited = np.sort(np.concatenate([visited, new]), kind="stable")  # two sorted runs: a merge
            remaining = remaining[~_member(remaining, new)]
            # a target whose pairs are all answered stops searching
            frontier = new[_member(new // n, np.unique(remaining // n))]
        keys = np.concatenate(found_keys)
        levels = np.concatenate(found_levels)
        o = np.argsort(keys, kind="stable")
        keys, levels = keys[o], levels[o]
        q = which.astype(np.int64) * n + sources
        i = np.minimum(np.searchsorted(keys, q), len(keys) - 1)
        return np.where(keys[i] == q, levels[i], UNREACHABLE)


def graph_steps(graph: StateGraph, spec: GraphSpec, seed: int, strategy, source_episode, source_step,
                goal_episode, goal_step, always=None) -> np.ndarray:
    """The ``graph_steps`` column of goal rows.

    Rows with a goal from the logs (``goal_episode >= 0``) whose goal state is drawn into the
    labelled share (``rng.uniform(seed, goal_episode, goal_step, 0, "graph") < goal_share``), or
    flagged by ``always``, get the steps from ``s_t+1`` to the goal state; the rest
    :data:`NOT_COMPUTED`. A pure function of the rows: independent of chunking.
    """
    ge = np.asarray(goal_episode, dtype=np.int64)
    out = np.full(len(ge), NOT_COMPUTED, np.int64)
    pick = ge >= 0
    if spec.goal_share < 1.0:
        u = rng.uniform(seed, np.maximum(ge, 0), np.maximum(goal_step, 0), 0, "graph")
        pick &= u < spec.goal_share
    if always is not None:
        pick |= np.asarray(always, bool) & (ge >= 0)
    if pick.any():
        src = graph.node_of(np.asarray(source_episode)[pick], np.asarray(source_step)[pick] + 1)
        tgt = graph.node_of(ge[pick], np.asarray(goal_step)[pick])
        out[pick] = graph.distances(src, tgt)
    return out


def _member(a: np.ndarray, sorted_b: np.ndarray) -> np.ndarray:
    """``a[i] in sorted_b`` for every i (``sorted_b`` sorted ascending)."""
    if not len(sorted_b):
        return np.zeros(len(a), bool)
    i = np.minimum(np.searchsorted(sorted_b, a), len(sorted_b) - 1)
    return sorted_b[i] == a
