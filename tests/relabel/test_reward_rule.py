"""RewardRule: distances against scipy, thresholds, reward forms, describe round trip."""

import json

import numpy as np
import pytest
from scipy.spatial import distance as sd

from goalkit.reward import DISTANCES, FORMS, RewardRule

from published_fetch_reward import fetch_reward_and_success, fetch_threshold

GEN = np.random.default_rng(11)  # invented test vectors (unit-test data only)
A = GEN.normal(size=(40, 4))
G = GEN.normal(size=(40, 4))
W = np.array([0.5, 2.0, 1.0, 3.0])


def scipy_rows(fn, a, g, **kw):
    return np.array([fn(u, v, **kw) for u, v in zip(a, g)])


# Reference: scipy.spatial.distance (SciPy 1.17 docs): euclidean(u, v, w) = sqrt(sum w (u-v)^2),
# cityblock(u, v, w) = sum w |u-v|, cosine(u, v, w) = 1 - sum w u v / sqrt(sum w u^2 sum w v^2).
@pytest.mark.parametrize("ours, theirs", [("euclidean", sd.euclidean), ("l1", sd.cityblock),
                                          ("chebyshev", sd.chebyshev), ("cosine", sd.cosine)])
def test_unweighted_distances_match_scipy(ours, theirs):
    got = RewardRule(ours, 0.1).distance(A, G)
    assert got.dtype == np.float64 and got.shape == (40,)
    np.testing.assert_allclose(got, scipy_rows(theirs, A, G), rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("ours, theirs", [("euclidean", sd.euclidean), ("l1", sd.cityblock),
                                          ("cosine", sd.cosine)])
def test_weighted_distances_match_scipy_w(ours, theirs):
    got = RewardRule(ours, 0.1, weights=W).distance(A, G)
    np.testing.assert_allclose(got, scipy_rows(theirs, A, G, w=W), rtol=1e-12, atol=1e-12)


def test_weighted_chebyshev():
    # scipy's chebyshev(w=) is the infinite-order weighted Minkowski limit, max over w > 0 of
    # |u - v| (SciPy 1.17 docs): weights only mask. Ours scales: max w |u - v|, which is
    # scipy's chebyshev of the scaled vectors; with 0/1 weights both definitions agree.
    got = RewardRule("chebyshev", 0.1, weights=W).distance(A, G)
    np.testing.assert_allclose(got, scipy_rows(sd.chebyshev, A * W, G * W), rtol=1e-12)
    mask = np.array([1.0, 0.0, 1.0, 0.0])
    got = RewardRule("chebyshev", 0.1, weights=mask).distance(A, G)
    np.testing.assert_allclose(got, scipy_rows(sd.chebyshev, A, G, w=mask), rtol=1e-12)


def test_box_is_chebyshev_of_tolerance_scaled_vectors():
    # box distance = max_d |delta_d| / tol_d = scipy chebyshev of a / tol and g / tol
    tol = np.array([0.1, 0.5, 1.0, 2.0])
    rule = RewardRule("box", tuple(tol))
    np.testing.assert_allclose(rule.distance(A, G), scipy_rows(sd.chebyshev, A / tol, G / tol),
                               rtol=1e-12)
    # reached iff |delta_d| <= tol_d for every d
    a = np.array([[0.1, 0.5, 1.0, 2.0], [0.1, 0.5, 1.0, 2.0001], [0.0, -0.5, 0.3, 0.0]])
    g = np.zeros_like(a)
    assert rule.reached(a, g).tolist() == [True, False, True]
    assert rule.replace(inclusive=False).reached(a, g).tolist() == [False, False, False]


def test_cosine_zero_vectors():
    # our convention (scipy returns nan here): both zero -> 0, exactly one zero -> 1
    rule = RewardRule("cosine", 0.1)
    a = np.array([[0.0, 0.0], [0.0, 0.0], [1.0, 2.0], [1.0, 0.0], [2.0, 0.0]])
    g = np.array([[0.0, 0.0], [3.0, 1.0], [0.0, 0.0], [-1.0, 0.0], [1.0, 0.0]])
    np.testing.assert_allclose(rule.distance(a, g), [0.0, 1.0, 1.0, 2.0, 0.0], atol=1e-15)


def test_five_centimetre_sparse_negative_rule():
    # Plappert et al. (2018, arXiv:1802.09464, sec. 1): the Fetch tasks' sparse reward. Their
    # published environment code (from memory; see published_fetch_reward.py) rewards
    # -(d > threshold), inclusive (0 at d == threshold); its success flag d < threshold is strict. Our inclusive=True + "sparse-negative" gives their reward,
    # inclusive=False gives their success flag.
    threshold = fetch_threshold()
    assert threshold == 0.05
    a = np.array([[0.049, 0.0, 0.0], [0.05, 0.0, 0.0], [0.051, 0.0, 0.0], [0.0, 0.03, 0.04]])
    g = np.zeros_like(a)
    their_reward, their_success = fetch_reward_and_success(a, g, threshold)
    assert their_reward.tolist() == [0.0, 0.0, -1.0, 0.0]
    incl = RewardRule("euclidean", threshold, inclusive=True, form="sparse-negative")
    excl = incl.replace(inclusive=False)
    r = incl.reward(a, g)
    assert r.dtype == np.float32
    np.testing.assert_array_equal(r, their_reward)
    np.testing.assert_array_equal(excl.reached(a, g), their_success)
    assert incl.reached(a, g).tolist() == [True, True, False, True]
    assert excl.reward(a, g).tolist() == [0.0, -1.0, -1.0, -1.0]


def test_forms():
    a = np.array([[0.0, 0.03], [0.0, 0.4], [3.0, 4.0]])
    g = np.zeros_like(a)
    base = RewardRule("euclidean", 0.05)
    assert base.reward(a, g).tolist() == [1.0, 0.0, 0.0]
    assert base.replace(form="sparse-negative").reward(a, g).tolist() == [0.0, -1.0, -1.0]
    np.testing.assert_allclose(base.replace(form="negative-distance").reward(a, g),
                               np.float32([-0.03, -0.4, -5.0]))
    clipped = RewardRule("euclidean", 0.05, form="clipped-negative-distance", clip=1.0)
    np.testing.assert_allclose(clipped.reward(a, g), np.float32([-0.03, -0.4, -1.0]))
    for form in FORMS:
        rule = clipped if form == "clipped-negative-distance" else base.replace(form=form)
        assert rule.reward(a, g).dtype == np.float32


def test_terminal_follows_end_on_reach():
    a = np.array([[0.0, 0.03], [0.0, 0.4]])
    g = np.zeros_like(a)
    assert RewardRule("l1", 0.05).terminal(a, g).tolist() == [False, False]
    assert RewardRule("l1", 0.05, end_on_reach=True).terminal(a, g).tolist() == [True, False]


def test_zero_threshold_exact_match():
    a = np.array([[1.0, 2.0], [1.0, 2.0 + 1e-12]])
    g = np.array([[1.0, 2.0], [1.0, 2.0]])
    assert RewardRule("l1", 0.0).reached(a, g).tolist() == [True, False]
    assert RewardRule("l1", 0.0, inclusive=False).reached(a, g).tolist() == [False, False]


@pytest.mark.parametrize("table", [
    {"threshold": 0.05},
    {"distance": "box", "threshold": [0.1, 0.2], "form": "sparse-negative", "inclusive": False},
    {"distance": "chebyshev", "threshold": 0.2, "weights": [1, 2], "end_on_reach": True},
    {"distance": "cosine", "threshold": 0.01, "form": "clipped-negative-distance", "clip": 0.5},
])
def test_describe_round_trip(table):
    rule = RewardRule.from_table(table)
    d = rule.describe()
    assert json.loads(json.dumps(d)) == d
    assert RewardRule.from_table(d) == rule
    assert RewardRule(**d) == rule
    assert d["distance"] in DISTANCES and d["threshold"] == table["threshold"]


def test_defaults():
    rule = RewardRule.from_table({"threshold": 0.05})
    assert (rule.distance_name, rule.inclusive, rule.form, rule.end_on_reach) == (
        "euclidean", True, "sparse", False)


def test_float32_inputs_and_shape_checks():
    a32 = A.astype(np.float32)
    rule = RewardRule("euclidean", 0.1)
    np.testing.assert_allclose(rule.distance(a32, G), scipy_rows(sd.euclidean, a32.astype(float), G))
    with pytest.raises(ValueError):
        rule.distance(A[:, :3], G)
    with pytest.raises(ValueError):
        RewardRule("euclidean", 0.1, weights=W).distance(A[:, :3], G[:, :3])


def test_from_distances_agrees_with_pairs():
    for rule in (RewardRule("box", (0.5, 0.5, 1.0, 1.0), form="sparse-negative"),
                 RewardRule("cosine", 0.3, inclusive=False),
                 RewardRule("l1", 2.0, form="clipped-negative-distance", clip=3.0)):
        d = rule.distance(A, G)
        assert np.array_equal(rule.reached_from(d), rule.reached(A, G))
        assert np.array_equal(rule.reward_from(d), rule.reward(A, G))
        assert 0 < rule.reached(A, G).sum() < len(A)  # both outcomes occur
    assert RewardRule("box", (0.5, 2.0)).reach_threshold == 1.0
    assert RewardRule("l1", 2.0).reach_threshold == 2.0
