"""Steps between logged states as tune's temporal threshold measures them, against networkx.

Reference outside the project: networkx 3.x ``single_source_shortest_path_length(G, source,
cutoff)`` (shortest path lengths of an unweighted graph, at most ``cutoff`` edges), on a graph
built here with networkx alone from the definition in goalkit.thresholds.temporal: an edge
``s_t -> s_t+1`` per logged transition and edges both ways between states of different episodes
that tune joins (identical goal vectors). The logs are random walks of the gantry's nozzle head
over the bench's cells (invented).
"""

import networkx as nx
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from goalkit.goals.stategraph import UNREACHABLE, StateGraph, identical_joins, transition_edges
from goalkit.thresholds.temporal import pair_steps


def walks(episodes, length, size, seed):
    rng = np.random.default_rng(seed)
    moves = np.array([[1, 0], [-1, 0], [0, 1], [0, -1]])
    cells, offsets = [], [0]
    for _ in range(episodes):
        pos = rng.integers(0, size, 2)
        t = int(rng.integers(1, length + 1))
        path = [pos]
        for _ in range(t):
            pos = np.clip(pos + moves[rng.integers(4)], 0, size - 1)
            path.append(pos)
        cells.append(np.array(path))
        offsets.append(offsets[-1] + t)
    return np.concatenate(cells).astype(np.float32), np.array(offsets, np.int64)


def reference(n, offsets, ju, jv):
    G = nx.DiGraph()
    G.add_nodes_from(range(n))
    for p in range(len(offsets) - 1):
        first = offsets[p] + p
        G.add_edges_from((first + t, first + t + 1) for t in range(offsets[p + 1] - offsets[p]))
    G.add_edges_from(zip(ju.tolist(), jv.tolist()))
    G.add_edges_from(zip(jv.tolist(), ju.tolist()))
    return G


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**31), size=st.sampled_from([3, 8, 40]), horizon=st.sampled_from([3, 12, None]))
def test_pair_steps_equal_networkx_shortest_paths(seed, size, horizon):
    # size 3: nearly every state is joined; 40: few joins, most pairs answered without a search
    cells, offsets = walks(8, 20, size, seed)
    n = len(cells)
    ju, jv = identical_joins(cells, offsets, 8)
    tail, head = transition_edges(offsets)
    graph = StateGraph(n, np.concatenate([tail, ju, jv]), np.concatenate([head, jv, ju]), n_joins=len(ju),
                       horizon=horizon, n_transitions=len(tail))
    rng = np.random.default_rng(seed)
    a = rng.integers(0, n, 300)
    b = np.where(rng.random(300) < 0.5, np.minimum(a + rng.integers(0, 15, 300), n - 1), rng.integers(0, n, 300))
    got = pair_steps(graph, offsets, np.concatenate([ju, jv]), a, b)
    G = reference(n, offsets, ju, jv)
    want = []
    for s, t in zip(a.tolist(), b.tolist()):  # a loop over pairs (small test logs)
        want.append(nx.single_source_shortest_path_length(G, s, cutoff=horizon).get(t, UNREACHABLE))
    np.testing.assert_array_equal(got, want)
    np.testing.assert_array_equal(got, graph.distances(a, b))


def test_without_joins_every_pair_is_answered_from_the_episode_order():
    offsets = np.array([0, 5, 5, 9])               # episodes of 5, 0 and 4 transitions: 6 + 1 + 5 states
    graph = StateGraph(12, *transition_edges(offsets), horizon=3)
    a = np.array([0, 0, 0, 2, 6, 6, 7, 7, 11])
    b = np.array([0, 3, 4, 1, 6, 7, 10, 11, 11])
    got = pair_steps(graph, offsets, np.zeros(0, np.int64), a, b)
    # 4 steps is beyond the horizon; backwards, across episodes: no path
    assert got.tolist() == [0, 3, UNREACHABLE, UNREACHABLE, 0, UNREACHABLE, 3, UNREACHABLE, 0]
    np.testing.assert_array_equal(got, graph.distances(a, b))
