"""Property tests (hypothesis) of the head builder's indexing and sampling rules
(goalkit/pipeline/headcols.py; laws in docs/dataset.md, "Goal heads in a built set")."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.heads import SOURCE_CODES, GoalHead
from goalkit.pipeline.headcols import choose_sources, goal_steps, random_states

SOURCES = ("current", "future", "geometric", "final", "episode", "subgoal")


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(1, 400), min_size=1, max_size=30), st.floats(0.01, 0.999),
       st.sampled_from(("clip", "renormalise")), st.integers(1, 60), st.integers(0, 2 ** 32))
def test_goal_steps_stay_in_their_documented_ranges(lengths, gamma, past_end, k, seed):
    T = np.repeat(np.array(lengths, dtype=np.int64), lengths)
    t = np.concatenate([np.arange(n, dtype=np.int64) for n in lengths])
    heads = [GoalHead(s, {s: 1.0}, gamma=gamma, past_end=past_end, steps=k) for s in SOURCES]
    u = np.random.default_rng(seed).random((len(heads), len(t)))
    u[:, :1] = 0.0
    u[:, 1:2] = np.nextafter(1.0, 0.0)   # the extremes of a 53-bit uniform
    src = np.array([[SOURCE_CODES[s]] * len(t) for s in SOURCES], dtype=np.uint8)
    j = goal_steps(heads, src, u, t, T)
    cur, fut, geo, fin, epi, sub = j
    assert np.array_equal(cur, t) and np.array_equal(fin, T) and np.array_equal(sub, np.minimum(t + k, T))
    assert ((fut > t) & (fut <= T)).all() and ((geo > t) & (geo <= T)).all()
    assert ((epi >= 0) & (epi <= T)).all()
    # u = 0 gives the first value of each range, u -> 1 the last
    assert fut[0] == t[0] + 1 and geo[0] == t[0] + 1 and epi[0] == 0
    if len(t) > 1:
        assert fut[1] == T[1] and epi[1] == T[1]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(1, 50), min_size=1, max_size=20), st.integers(0, 2 ** 32))
def test_random_states_enumerate_every_state_once(lengths, start):
    ids = np.cumsum(np.arange(len(lengths)) + 1 + start % 7).astype(np.int64)   # increasing, not 0 .. E-1
    S = int(sum(lengths) + len(lengths))
    u = (np.arange(S) + 0.5) / S                      # one uniform inside each state's cell
    e, j = random_states(ids, np.array(lengths), u)
    pairs = [(a, b) for i, n in zip(ids.tolist(), lengths) for a, b in [(i, s) for s in range(n + 1)]]
    assert list(zip(e.tolist(), j.tolist())) == pairs
    e0, j0 = random_states(ids, np.array(lengths), np.array([0.0, np.nextafter(1.0, 0.0)]))
    assert (e0[0], j0[0]) == (ids[0], 0) and (e0[1], j0[1]) == (ids[-1], lengths[-1])


@settings(max_examples=100, deadline=None)
@given(st.dictionaries(st.sampled_from(SOURCES), st.floats(0.0, 5.0), min_size=1), st.integers(0, 2 ** 32))
def test_sources_are_only_those_of_positive_weight(weights, seed):
    if not any(w > 0 for w in weights.values()):
        weights = {**weights, "future": 1.0}
    head = GoalHead("h", weights)
    u = np.random.default_rng(seed).random((1, 500))
    u[0, :2] = (0.0, np.nextafter(1.0, 0.0))
    src = choose_sources([head], u)[0]
    allowed = {SOURCE_CODES[s] for s, w in weights.items() if w > 0}
    assert set(src.tolist()) <= allowed
