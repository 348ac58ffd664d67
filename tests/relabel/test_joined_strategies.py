"""neighbour / library / near_miss: sampling rules as properties, checked against scipy's cdist.

References outside the project: ``scipy.spatial.distance.cdist`` (Virtanen et al. 2020, SciPy
1.0) gives the brute-force distances every neighbour, near-miss and library match is checked
against; its ``cityblock``, ``chebyshev`` and ``cosine`` metrics are the l1, chebyshev and
cosine distances of the reward rule (unweighted). Data are invented unit-test states.
"""

import pickle

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.distance import cdist

from goalkit.relabel import CODES, Mixture, RelabelContext
from goalkit.relabel.library import match_library
from goalkit.relabel.search import build_goal_search
from goalkit.reward import RewardRule
from relabel_testdata import make_set

NEIGHBOUR, LIBRARY, NEAR_MISS = CODES["neighbour"], CODES["library"], CODES["near_miss"]


def layout(lengths):
    lengths = np.asarray(lengths, dtype=np.int64)
    starts = np.concatenate([[0], np.cumsum(lengths + 1)])[:-1]
    return lengths, starts


def world(lengths, codes, dim, seed, k, method="exact", rule=None, recall=0.95):
    """Goal table of random trajectories, the search over it and a context with both splits."""
    lengths, starts = layout(lengths)
    gen = np.random.default_rng(seed)  # test data only
    steps = gen.normal(0, 0.05, (int((lengths + 1).sum()), dim))
    owner = np.repeat(np.arange(len(lengths)), lengths + 1)
    table = (np.cumsum(steps, axis=0) - np.repeat(np.cumsum(steps, axis=0)[starts], lengths + 1, axis=0)
             + gen.uniform(0, 1, (len(lengths), dim))[owner]).astype(np.float32)
    rule = rule or RewardRule("euclidean", 0.05)
    ids = np.arange(len(lengths), dtype=np.int64)
    search = build_goal_search(table, ids, lengths, codes, rule, k=k, method=method, target_recall=recall,
                               seed=seed)
    ctx = RelabelContext.from_lengths(lengths, codes, neighbours=search)
    return table, starts, search, ctx, rule


def split_codes_with_two_each(draw, n):
    codes = draw(st.lists(st.integers(0, 1), min_size=n, max_size=n))
    if sum(codes) < 2 or n - sum(codes) < 2:
        codes = [0] * n
    return np.asarray(codes, dtype=np.int64)


@settings(max_examples=40, deadline=None)
@given(st.data())
def test_neighbour_and_near_miss_rules(data):
    n = data.draw(st.integers(2, 9), label="episodes")
    lengths = data.draw(st.lists(st.integers(1, 14), min_size=n, max_size=n), label="lengths")
    codes = split_codes_with_two_each(data.draw, n)
    k = data.draw(st.integers(1, 4), label="k")
    seed = data.draw(st.integers(0, 2**40), label="seed")
    table, starts, search, ctx, rule = world(lengths, codes, 2, seed % 1000, k)
    chunk = make_set(lengths)
    rows = Mixture({"neighbour": 1, "near_miss": 1}, goals_per_transition=3, neighbours=k).assign(chunk, seed, ctx)
    ln = np.asarray(lengths)
    src = np.searchsorted(chunk.offsets, rows.transition, side="right") - 1
    t = rows.transition - chunk.offsets[src]
    s, ge, gj, he, hs, j = (rows.strategy, rows.goal_episode, rows.goal_step, rows.hop_episode,
                            rows.hop_step, rows.join_step)
    # every row joins at a later state of its own episode
    assert np.all((j > t) & (j <= ln[src]))
    nb = s == NEIGHBOUR
    assert np.all(ge[nb] != src[nb]) and np.all(codes[ge[nb]] == codes[src[nb]])     # other episode, same split
    assert np.all(he[nb] == ge[nb]) and np.all((hs[nb] >= 0) & (gj[nb] >= hs[nb]) & (gj[nb] <= ln[ge[nb]]))
    assert np.all(rows.steps_to_goal[nb] == -1)
    # the hop state is among the k nearest other-episode states of the join state (scipy cdist)
    owner = np.repeat(np.arange(n), ln + 1)
    split_of_state = codes[owner]
    for r in np.flatnonzero(nb | (s == NEAR_MISS)):
        q = table[starts[src[r]] + j[r]].astype(np.float64)
        d = cdist(q[None], table.astype(np.float64))[0]
        usable = (owner != src[r]) & (split_of_state == codes[src[r]])
        if s[r] == NEAR_MISS:
            usable &= d > 0.05
            if he[r] < 0:   # fallback: nothing beyond the threshold in the split
                assert not usable.any() and ge[r] == src[r] and gj[r] == j[r]
                continue
            assert ge[r] == he[r] and gj[r] == hs[r]
            assert d[starts[he[r]] + hs[r]] > 0.05                                  # beyond the threshold
        hop_d = d[starts[he[r]] + hs[r]]
        kth = np.sort(d[usable])[min(k, usable.sum()) - 1]
        assert usable[starts[he[r]] + hs[r]] and hop_d <= kth + 1e-6


@settings(max_examples=30, deadline=None)
@given(st.lists(st.integers(1, 10), min_size=3, max_size=8), st.data())
def test_chunking_invariance(lengths, data):
    cut = data.draw(st.integers(1, len(lengths) - 1))
    seed = data.draw(st.integers(0, 2**50))
    codes = np.zeros(len(lengths), np.int64)
    table, starts, search, ctx, rule = world(lengths, codes, 3, 7, 2)
    mix = Mixture({"neighbour": 2, "near_miss": 1, "future": 1}, goals_per_transition=2, neighbours=2)
    whole = mix.assign(make_set(lengths), seed, ctx)
    a = mix.assign(make_set(lengths[:cut]), seed, ctx)
    b = mix.assign(make_set(lengths[cut:], first_id=cut), seed, ctx)
    for name in ("strategy", "goal_episode", "goal_step", "hop_episode", "hop_step", "join_step", "steps_to_goal"):
        assert np.array_equal(getattr(whole, name), np.concatenate([getattr(a, name), getattr(b, name)])), name


def test_candidates_survive_pickling_and_ivf_reaches_its_recall():
    # 80 episodes x 60 states: above the IVF minimum of 39 training points per list
    lengths = [59] * 80
    codes = np.zeros(80, np.int64)
    table, starts, search, ctx, rule = world(lengths, codes, 4, 3, 5, method="ivf", recall=0.9)
    rep = search.describe()["train"]
    assert rep["index"]["method"] == "ivf" and rep["recall_lower"] >= 0.9 and rep["recall_queries"] == 1000
    clone = pickle.loads(pickle.dumps(search))
    for e in (0, 41, 79):
        for x, y in zip(search.candidates("neighbour", e), clone.candidates("neighbour", e)):
            assert np.array_equal(x, y)
    # filtered recall@5 over every state, against brute force (scipy cdist), tie-aware
    owner = np.repeat(np.arange(80), 60)
    D = cdist(table.astype(np.float64), table.astype(np.float64))
    D[owner[:, None] == owner[None, :]] = np.inf
    kth = np.sort(D, axis=1)[:, 4]
    hits = []
    for e in range(80):
        eps, steps, cnt = search.candidates("neighbour", e)
        rows = np.arange(starts[e], starts[e] + 60)
        got = D[rows[:, None], starts[eps] + steps]
        hits.append((got <= kth[rows, None] + 1e-9).sum(axis=1) / 5)
    assert np.mean(np.concatenate(hits)) >= 0.88   # the 0.9 target, measured on a 1000-state sample


def test_exact_candidates_equal_brute_force_order():
    lengths = [9, 4, 12, 7]
    table, starts, search, ctx, rule = world(lengths, np.zeros(4, np.int64), 2, 11, 3)
    owner = np.repeat(np.arange(4), np.asarray(lengths) + 1)
    D = cdist(table.astype(np.float64), table.astype(np.float64))
    for e in range(4):
        eps, steps, cnt = search.candidates("neighbour", e)
        assert np.all(cnt == 3)
        for j in range(lengths[e] + 1):
            d = np.where(owner != e, D[starts[e] + j], np.inf)
            np.testing.assert_allclose(D[starts[e] + j, starts[eps[j]] + steps[j]], np.sort(d)[:3], rtol=1e-6)


def test_near_miss_of_a_dense_split_uses_exhaustive_search():
    # 1,200 states of one other episode sit within the threshold; the nearest beyond lies past them
    own = np.zeros((3, 2))
    crowd = np.random.default_rng(0).uniform(-0.01, 0.01, (1200, 2))
    far = np.array([[0.5, 0.0], [0.6, 0.0], [0.7, 0.0]])
    table = np.concatenate([own, crowd, far]).astype(np.float32)
    lengths = np.array([2, 1199, 2])
    rule = RewardRule("euclidean", 0.05)
    search = build_goal_search(table, np.arange(3), lengths, np.zeros(3), rule, k=2)
    eps, steps, cnt = search.candidates("near_miss", 0)
    assert np.all(cnt == 2) and np.all(eps == 2) and np.array_equal(steps, [[0, 1]] * 3)


def test_a_split_of_one_episode_is_refused():
    import pytest

    from goalkit.errors import RecipeError

    with pytest.raises(RecipeError) as info:
        world([5, 6, 7], np.array([0, 0, 1]), 2, 0, 2)
    assert "validation split has 1" in info.value.message and info.value.key == "relabel.weights.neighbour"


def rule_for(metric):
    name = {"euclidean": "euclidean", "cityblock": "l1", "chebyshev": "chebyshev", "cosine": "cosine"}[metric]
    return RewardRule(name, {"euclidean": 0.3, "cityblock": 0.4, "chebyshev": 0.2, "cosine": 0.05}[metric])


def test_library_matches_equal_brute_force():
    for metric in ("euclidean", "cityblock", "chebyshev", "cosine"):
        gen = np.random.default_rng(4)
        lengths = np.array([30, 12, 45, 20])
        _, starts = layout(lengths)
        table = gen.uniform(-1, 1, (int((lengths + 1).sum()), 3)).astype(np.float32)
        targets = np.concatenate([table[[5, 40, 77]], gen.uniform(-1, 1, (6, 3)), [[9.0, 9.0, 9.0]]])
        targets = targets.astype(np.float32).astype(np.float64)
        rule = rule_for(metric)
        lib = match_library(targets, table, np.arange(4), lengths, rule)
        ref = cdist(table.astype(np.float64), targets, metric=metric) <= rule.threshold
        state, tgt = np.nonzero(ref)
        owner = np.searchsorted(starts, state, side="right") - 1
        got_state = starts[np.repeat(np.arange(4), np.diff(lib.match_offsets))] + lib.match_step
        assert np.array_equal(got_state, state) and np.array_equal(lib.match_target, tgt), metric
        assert np.array_equal(lib.counts, ref.sum(axis=0)), metric
        assert lib.describe()["unreached"] == np.flatnonzero(ref.sum(axis=0) == 0).tolist(), metric
        if metric != "cosine":   # (a direction, not a point, for cosine)
            assert 9 in lib.describe()["unreached"]   # the target far outside the logs
        assert np.array_equal(np.diff(lib.match_offsets), np.bincount(owner, minlength=4))


def test_library_strategy_takes_a_later_match_or_flags_none():
    gen = np.random.default_rng(8)
    lengths = np.array([25, 18, 30])
    _, starts = layout(lengths)
    table = gen.uniform(0, 1, (int((lengths + 1).sum()), 2)).astype(np.float32)
    targets = table[[3, 20, 50, 60]].astype(np.float64)
    rule = RewardRule("euclidean", 0.08)
    lib = match_library(targets, table, np.arange(3), lengths, rule)
    ctx = RelabelContext.from_lengths(lengths, library=lib)
    chunk = make_set(lengths)
    rows = Mixture({"library": 1}, goals_per_transition=4, library="t.npy").assign(chunk, 5, ctx)
    src = np.searchsorted(chunk.offsets, rows.transition, side="right") - 1
    t = rows.transition - chunk.offsets[src]
    reach = cdist(table.astype(np.float64), targets) <= 0.08
    tgt = np.array([int(np.flatnonzero(np.all(targets == g, axis=1))[0]) for g in rows.external])
    matched = rows.join_step >= 0
    j = rows.join_step
    assert np.all(rows.goal_episode == -1) and np.all(rows.goal_step == -1)
    assert np.all(j[matched] > t[matched]) and np.all(rows.steps_to_goal[matched] == (j - t)[matched])
    assert np.all(reach[starts[src[matched]] + j[matched], tgt[matched]])
    for r in np.flatnonzero(~matched):   # no target reached after t in the episode
        later = np.arange(starts[src[r]] + t[r] + 1, starts[src[r]] + lengths[src[r]] + 1)
        assert not reach[later].any() and rows.steps_to_goal[r] == -1
    for r in np.flatnonzero(matched)[:50]:
        later = np.arange(starts[src[r]] + t[r] + 1, starts[src[r]] + lengths[src[r]] + 1)
        assert reach[later].any()
    assert matched.any() and (~matched).any()


def test_near_miss_under_chebyshev_and_box_rules_against_cdist():
    # the search space scales box tolerances; beyond-threshold is judged by the rule itself
    lengths = [12, 9, 15, 11]
    owner = np.repeat(np.arange(4), np.asarray(lengths) + 1)
    for rule, metric, scale in ((RewardRule("chebyshev", 0.04), "chebyshev", np.ones(2)),
                                (RewardRule("box", [0.02, 0.08]), "chebyshev", 1 / np.array([0.02, 0.08]))):
        table, starts, search, ctx, _ = world(lengths, np.zeros(4, np.int64), 2, 5, 3, rule=rule)
        D = cdist(table.astype(np.float64) * scale, table.astype(np.float64) * scale, metric=metric)
        thr = 1.0 if rule.distance_name == "box" else 0.04
        for e in range(4):
            eps, steps, cnt = search.candidates("near_miss", e)
            for j in range(lengths[e] + 1):
                d = np.where((owner != e) & (D[starts[e] + j] > thr), D[starts[e] + j], np.inf)
                got = D[starts[e] + j, starts[eps[j, :cnt[j]]] + steps[j, :cnt[j]]]
                assert np.all(got > thr)
                # nearest beyond the threshold among the searched candidates: never nearer than the true k-th
                assert cnt[j] == min(3, np.isfinite(d).sum())
                np.testing.assert_allclose(np.sort(got), np.sort(d)[:cnt[j]], rtol=1e-6)
