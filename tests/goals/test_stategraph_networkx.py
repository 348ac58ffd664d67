"""The logs' graph distances against networkx, on gridworld-like logs made here.

Reference outside the project: networkx (a test dependency, ``pip install goalkit[test]``).
Its documented functions, networkx 3.6 reference (checked against the installed 3.6.1 docstrings):

* ``networkx.single_source_shortest_path_length(G, source, cutoff=None)``: "Compute the shortest
  path lengths from source to all reachable nodes in G" (Algorithms > Shortest Paths >
  Unweighted); ``cutoff`` keeps the nodes at most ``cutoff`` edges away;
* ``networkx.bfs_layers(G, sources)``: the layers of a breadth-first traversal (Algorithms >
  Traversal > Breadth First Search): layer ``k`` is the set of nodes exactly ``k`` edges away;
* ``networkx.has_path(G, source, target)``.

The reference graph is built here with networkx alone (no goalkit code): a node per logged
state, an edge ``s_t -> s_t+1`` per logged transition (one way) and edges both ways between states
of different episodes whose cells are at most the join radius apart (Euclidean), the definition
in docs/graph.md. The logs are random walks of the gantry's nozzle head over the bench's cells,
one cell per step (invented).
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from hypothesis import given, settings, strategies as st

from goalkit.goals.stategraph import (UNREACHABLE, GraphSettings, StateGraph, identical_joins,
                                      transition_edges)

MOVES = np.array([[1, 0], [-1, 0], [0, 1], [0, -1]])


def bench_walks(episodes=10, length=25, size=6, seed=0, one_way=False):
    """Cells visited by the nozzle head (x, y in 0 .. size-1); one_way: steps only right or up."""
    rng = np.random.default_rng(seed)
    cells, offsets = [], [0]
    for _ in range(episodes):
        pos = rng.integers(0, size, 2)
        path = [pos.copy()]
        options = MOVES[[0, 2]] if one_way else MOVES
        for _ in range(length):
            nxt = np.clip(pos + options[rng.integers(len(options))], 0, size - 1)  # a wall: stay
            pos = nxt
            path.append(pos.copy())
        cells.append(np.array(path))
        offsets.append(offsets[-1] + length)
    return np.concatenate(cells).astype(np.float32), np.array(offsets, np.int64)


def networkx_graph(cells, offsets, radius):
    """The reference graph, built with networkx from the definition (brute force over pairs)."""
    G = nx.DiGraph()
    n = len(cells)
    G.add_nodes_from(range(n))
    episode = np.repeat(np.arange(len(offsets) - 1), np.diff(offsets) + 1)
    for p in range(len(offsets) - 1):
        first = offsets[p] + p
        G.add_edges_from((first + t, first + t + 1) for t in range(offsets[p + 1] - offsets[p]))
    d = np.sqrt(((cells[:, None, :].astype(np.float64) - cells[None, :, :]) ** 2).sum(-1))
    u, v = np.nonzero((d <= radius) & (episode[:, None] != episode[None, :]))
    G.add_edges_from(zip(u.tolist(), v.tolist()))
    return G


def ours(cells, offsets, radius, horizon=None):
    return StateGraph.from_logs(cells, offsets, GraphSettings(join_radius=radius, join_neighbours=len(cells),
                                                              horizon=horizon, index_method="exact"))


@pytest.mark.parametrize("radius, one_way", [(0.0, False), (0.0, True), (1.0, False), (1.5, False)])
def test_graph_distances_equal_networkx_shortest_path_lengths(radius, one_way):
    # radius 0 joins equal cells, 1.0 the four neighbouring cells too, 1.5 the diagonal ones as well
    cells, offsets = bench_walks(one_way=one_way, seed=int(radius * 10) + one_way)
    n = len(cells)
    G = networkx_graph(cells, offsets, radius)
    g = ours(cells, offsets, radius)
    assert g.n_transitions_ + 2 * g.n_joins_ == G.number_of_edges()
    src = np.repeat(np.arange(0, n, 5), n)
    tgt = np.tile(np.arange(n), len(range(0, n, 5)))
    got = g.distances(src, tgt).reshape(-1, n)
    unreachable = 0
    for i, s in enumerate(range(0, n, 5)):
        lengths = nx.single_source_shortest_path_length(G, s)
        want = np.array([lengths.get(t, UNREACHABLE) for t in range(n)])
        np.testing.assert_array_equal(got[i], want)
        unreachable += int((want == UNREACHABLE).sum())
    if one_way:
        assert unreachable > 0  # the one-way walks leave states unreachable


@pytest.mark.parametrize("horizon", [1, 4, 9])
def test_horizon_equals_networkx_cutoff_and_bfs_layers(horizon):
    cells, offsets = bench_walks(seed=4)
    n = len(cells)
    G = networkx_graph(cells, offsets, 0.0)
    g = ours(cells, offsets, 0.0, horizon=horizon)
    for s in range(0, n, 23):
        got = g.distances(np.full(n, s), np.arange(n))
        lengths = nx.single_source_shortest_path_length(G, s, cutoff=horizon)
        np.testing.assert_array_equal(got, [lengths.get(t, UNREACHABLE) for t in range(n)])
        # breadth-first layers: layer k is exactly the states k steps away (k <= horizon)
        for k, layer in enumerate(nx.bfs_layers(G, [s])):
            if k > horizon:
                break
            assert set(np.flatnonzero(got == k).tolist()) == set(layer)


def test_triangle_inequality_on_sampled_triples_as_networkx_has_it():
    cells, offsets = bench_walks(seed=7)
    G = networkx_graph(cells, offsets, 1.0)
    g = ours(cells, offsets, 1.0)
    rng = np.random.default_rng(3)
    a, b, c = rng.integers(0, len(cells), (3, 4000))
    ab, bc, ac = g.distances(a, b), g.distances(b, c), g.distances(a, c)
    both = (ab >= 0) & (bc >= 0)
    assert both.sum() > 1000
    # a path a -> b -> c exists, so a -> c is reachable and no longer than the detour
    assert (ac[both] >= 0).all() and (ac[both] <= ab[both] + bc[both]).all()
    # and the numbers are networkx's on a sample of the triples
    for i in np.flatnonzero(both)[:40]:
        assert ac[i] == nx.shortest_path_length(G, int(a[i]), int(c[i]))


def test_one_way_transitions_give_asymmetric_distances():
    # steps only right or up, joins only at equal cells: from a cell the logs reach only cells
    # with x' >= x and y' >= y, so the way back does not exist
    cells, offsets = bench_walks(one_way=True, seed=9)
    G = networkx_graph(cells, offsets, 0.0)
    g = ours(cells, offsets, 0.0)
    rng = np.random.default_rng(5)
    a, b = rng.integers(0, len(cells), (2, 5000))
    ab, ba = g.distances(a, b), g.distances(b, a)
    forward = (ab > 0) & (cells[a] != cells[b]).any(axis=1)
    assert forward.sum() > 200
    assert (ba[forward] == UNREACHABLE).all()
    assert (cells[b[forward]] >= cells[a[forward]]).all()  # every reachable goal lies right of / above
    for i in np.flatnonzero(forward)[:30]:
        assert nx.has_path(G, int(a[i]), int(b[i])) and not nx.has_path(G, int(b[i]), int(a[i]))
    # equal cells of different episodes are joined both ways: symmetric one-step distances
    episode = np.repeat(np.arange(len(offsets) - 1), np.diff(offsets) + 1)
    joined = (cells[a] == cells[b]).all(axis=1) & (episode[a] != episode[b])
    assert joined.sum() > 20 and (ab[joined] == 1).all() and (ba[joined] == 1).all()


# ---- identical_joins: the radius-0 joins found by sorting (what tune's temporal threshold uses) ----
def graph_of_identical(cells, offsets, neighbours, horizon=None):
    tail, head = transition_edges(offsets)
    ju, jv = identical_joins(cells, offsets, neighbours)
    return StateGraph(len(cells), np.concatenate([tail, ju, jv]), np.concatenate([head, jv, ju]),
                      n_joins=len(ju), horizon=horizon, n_transitions=len(tail))


@pytest.mark.parametrize("one_way", [False, True])
def test_identical_joins_equal_networkx_at_radius_0(one_way):
    cells, offsets = bench_walks(one_way=one_way, seed=11 + one_way)
    n = len(cells)
    G = networkx_graph(cells, offsets, 0.0)
    g = graph_of_identical(cells, offsets, neighbours=n)  # no cap: every identical pair
    assert g.n_joins_ > 50
    assert g.n_transitions_ + 2 * g.n_joins_ == G.number_of_edges()
    for s in range(0, n, 7):
        lengths = nx.single_source_shortest_path_length(G, s)
        got = g.distances(np.full(n, s), np.arange(n))
        np.testing.assert_array_equal(got, [lengths.get(t, UNREACHABLE) for t in range(n)])


@settings(max_examples=150, deadline=None)
@given(values=st.lists(st.sampled_from([0.0, -0.0, 1.0, 2.5]), min_size=2, max_size=60),
       cuts=st.lists(st.integers(0, 30), max_size=6), neighbours=st.integers(1, 5))
def test_identical_joins_against_the_pairwise_definition(values, cuts, neighbours):
    x = np.array(values, dtype=np.float64).reshape(-1, 1)
    n = len(x)
    # episodes: cut the n states into runs (each episode has at least one state: T = run - 1)
    bounds = sorted({0, n, *[c for c in cuts if 0 < c < n]})
    offsets = np.array([b - i for i, b in enumerate(bounds)], np.int64)  # transition offsets
    episode = np.repeat(np.arange(len(bounds) - 1), np.diff(bounds))
    u, v = identical_joins(x, offsets, neighbours)
    got = set(zip(u.tolist(), v.tolist()))
    # the definition (brute force): equal values (-0.0 == 0.0), other episodes; each member of a
    # set of equal states joins the first neighbours + 1 members of its set, in row order
    want = set()
    for i in range(n):
        members = [j for j in range(n) if x[j, 0] == x[i, 0]][:neighbours + 1]
        want |= {(min(i, j), max(i, j)) for j in members if episode[j] != episode[i]}
    assert got == want
    assert all(a < b for a, b in got)
