"""The logs' graph against breadth-first search done by others.

References outside the project: scipy.sparse.csgraph.shortest_path (unweighted, i.e.
breadth-first search; scipy documentation) and networkx.single_source_shortest_path_length
(networkx is a test dependency; tests/goals/test_stategraph_networkx.py has the fuller check). The gridworld logs are generated here: every step moves one cell.
"""

import numpy as np
import pytest
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import breadth_first_order, shortest_path

from goalkit.errors import ParameterError
from goalkit.goals.stategraph import UNREACHABLE, GraphSettings, StateGraph, state_episodes

MOVES = np.array([[1, 0], [-1, 0], [0, 1], [0, -1]])


def grid_logs(episodes=12, length=30, size=7, seed=0, one_way=False):
    """Random walks on a size x size grid; each step one cell. one_way: moves only right or up."""
    rng = np.random.default_rng(seed)
    cells, offsets = [], [0]
    for _ in range(episodes):
        pos = rng.integers(0, size, 2)
        path = [pos.copy()]
        for _ in range(length):
            options = MOVES
            if one_way:
                options = MOVES[[0, 2]]
            nxt = pos + options[rng.integers(len(options))]
            if (nxt < 0).any() or (nxt >= size).any():
                nxt = pos  # stay: still one logged transition
            pos = nxt
            path.append(pos.copy())
        cells.append(np.array(path))
        offsets.append(offsets[-1] + length)
    return np.concatenate(cells).astype(np.float32), np.array(offsets, np.int64)


def reference_matrix(cells, offsets):
    """The same graph built by brute force: transitions one way, same-cell states of other episodes both ways."""
    n = len(cells)
    ep = np.repeat(np.arange(len(offsets) - 1), np.diff(offsets) + 1)
    rows, cols = [], []
    for p in range(len(offsets) - 1):
        first = offsets[p] + p
        for t in range(offsets[p + 1] - offsets[p]):
            rows.append(first + t)
            cols.append(first + t + 1)
    same = (cells[:, None, :] == cells[None, :, :]).all(-1) & (ep[:, None] != ep[None, :])
    u, v = np.nonzero(same)
    rows += list(u)
    cols += list(v)
    return coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(n, n)).tocsr()


def all_pairs(graph, n):
    src = np.repeat(np.arange(n), n)
    tgt = np.tile(np.arange(n), n)
    return graph.distances(src, tgt).reshape(n, n)


@pytest.mark.parametrize("one_way", [False, True])
def test_distances_equal_scipy_bfs(one_way):
    cells, offsets = grid_logs(one_way=one_way)
    g = StateGraph.from_logs(cells, offsets, GraphSettings(join_radius=0.0, join_neighbours=400, horizon=None,
                                                           batch=37))
    ref = shortest_path(reference_matrix(cells, offsets), method="D", directed=True, unweighted=True)
    n = len(cells)
    ours = all_pairs(g, n)
    expected = np.where(np.isinf(ref), UNREACHABLE, ref).astype(np.int64)
    np.testing.assert_array_equal(ours, expected)
    # breadth_first_order agrees on what is reachable at all (scipy's own BFS)
    for s in (0, n // 2, n - 1):
        reach = breadth_first_order(reference_matrix(cells, offsets), s, directed=True, return_predecessors=False)
        assert set(np.flatnonzero(ours[s] != UNREACHABLE)) == set(reach.tolist())
    # the graph's own CSR is the reference graph
    assert (g.csr() != (reference_matrix(cells, offsets) > 0)).nnz == 0


def test_distances_equal_networkx():
    import networkx as nx
    cells, offsets = grid_logs(episodes=6, length=20)
    g = StateGraph.from_logs(cells, offsets, GraphSettings(join_neighbours=200, horizon=None))
    G = nx.DiGraph(reference_matrix(cells, offsets))
    n = len(cells)
    ours = all_pairs(g, n)
    for s in range(0, n, 7):
        lengths = nx.single_source_shortest_path_length(G, s)
        for t in range(n):
            assert ours[s, t] == lengths.get(t, UNREACHABLE)


def test_horizon_cuts_longer_paths_only():
    cells, offsets = grid_logs()
    n = len(cells)
    full = all_pairs(StateGraph.from_logs(cells, offsets, GraphSettings(join_neighbours=400, horizon=None)), n)
    cut = all_pairs(StateGraph.from_logs(cells, offsets, GraphSettings(join_neighbours=400, horizon=3)), n)
    short = (full >= 0) & (full <= 3)
    np.testing.assert_array_equal(cut[short], full[short])
    assert (cut[~short] == UNREACHABLE).all()
    assert short.sum() > n and (~short).sum() > n  # both kinds occur


def test_triangle_inequality_on_sampled_triples():
    cells, offsets = grid_logs(seed=3)
    g = StateGraph.from_logs(cells, offsets, GraphSettings(join_neighbours=400, horizon=None))
    rng = np.random.default_rng(1)
    a, b, c = rng.integers(0, len(cells), (3, 5000))
    ab, bc, ac = g.distances(a, b), g.distances(b, c), g.distances(a, c)
    both = (ab >= 0) & (bc >= 0)
    assert both.sum() > 1000
    assert (ac[both] >= 0).all()
    assert (ac[both] <= ab[both] + bc[both]).all()


def test_one_way_transitions_are_asymmetric():
    # one episode 0 -> 1 -> 2 -> 3 along a line, nothing else: forward paths only
    cells = np.array([[0, 0], [1, 0], [2, 0], [3, 0]], np.float32)
    g = StateGraph.from_logs(cells, np.array([0, 3]), GraphSettings())
    assert g.distances([0, 3, 1], [3, 0, 1]).tolist() == [3, UNREACHABLE, 0]
    # a second episode walking back, joined at equal cells, opens the way back (join = one step)
    cells2 = np.concatenate([cells, cells[::-1]])
    g2 = StateGraph.from_logs(cells2, np.array([0, 3, 6]), GraphSettings())
    assert state_episodes([0, 3, 6]).tolist() == [0] * 4 + [1] * 4
    # 3 -> join to state 4 (cell 3) -> 5 -> 6 -> 7 (cell 0) -> join to state 0: 5 steps
    assert g2.distances([3], [0]).tolist() == [5]
    assert g2.n_joins_ == 4


@pytest.mark.parametrize("bad", [-0.5, float("nan"), float("inf"), "1"])
def test_join_radius_must_be_finite_and_non_negative(bad):
    with pytest.raises(ParameterError) as err:
        GraphSettings(join_radius=bad)
    assert str(err.value).startswith("GraphSettings join_radius: expected a finite number >= 0")


def test_batching_and_pair_order_do_not_change_results():
    cells, offsets = grid_logs(seed=5)
    rng = np.random.default_rng(2)
    s, t = rng.integers(0, len(cells), (2, 3000))
    a = StateGraph.from_logs(cells, offsets, GraphSettings(join_neighbours=64, batch=1, horizon=10)).distances(s, t)
    b = StateGraph.from_logs(cells, offsets, GraphSettings(join_neighbours=64, batch=999, horizon=10))
    perm = rng.permutation(len(s))
    np.testing.assert_array_equal(b.distances(s[perm], t[perm]), a[perm])
