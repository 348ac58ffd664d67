"""Goal masks and goal regions in the one scorer (goalkit.reward.score).

Outside references: the published Fetch-style sparse reward ``-(d > 0.05)`` and success
``d < 0.05`` (Plappert et al., 2018, sec. 1; restated from memory in
tests/published_fetch_reward.py), and plain numpy formulas of the masked distances written
here independently of goalkit.reward.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from goalkit.errors import ParameterError, RecipeError
from goalkit.reward import DISTANCES, RewardRule, score
from published_fetch_reward import fetch_reward_and_success, fetch_threshold

RNG = np.random.default_rng(20261202)


def _rules(g):
    """One rule of every distance for goals of dimension ``g``."""
    return [RewardRule("euclidean", 0.3), RewardRule("l1", 0.5, form="sparse-negative"),
            RewardRule("chebyshev", 0.2, form="negative-distance"),
            RewardRule("euclidean", 0.3, weights=tuple(np.linspace(0.5, 2.0, g))),
            RewardRule("cosine", 0.1), RewardRule("cosine", 0.1, weights=tuple(np.linspace(1, 3, g))),
            RewardRule("box", tuple(np.linspace(0.1, 0.4, g))),
            RewardRule("region", lower=(-0.2,) * g, upper=(0.1,) * g),
            RewardRule("l1", 0.5, form="clipped-negative-distance", clip=0.7)]


def test_every_distance_is_covered():
    assert {r.distance_name for r in _rules(3)} == set(DISTANCES)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_full_mask_equals_no_mask_bit_for_bit(dtype):
    a = RNG.normal(size=(5000, 3)).astype(dtype)
    g = RNG.normal(size=(5000, 3)).astype(dtype)
    for mask in (np.ones((5000, 3), np.uint8), np.ones((5000, 3), bool)):
        for rule in _rules(3):
            plain, masked = score(rule, a, g).columns(), score(rule, a, g, mask).columns()
            for name in plain:
                assert plain[name].tobytes() == masked[name].tobytes(), (rule, name)


def test_masked_distances_match_numpy_formulas_on_the_kept_dimensions():
    a = RNG.normal(size=(4000, 4))
    g = RNG.normal(size=(4000, 4))
    mask = RNG.random((4000, 4)) < 0.6
    mask[~mask.any(axis=1), 0] = True
    delta = np.where(mask, a - g, 0.0)
    np.testing.assert_allclose(RewardRule("euclidean", 1.0).distance(a, g, mask),
                               np.sqrt((delta ** 2).sum(axis=1)), rtol=1e-12)
    np.testing.assert_allclose(RewardRule("l1", 1.0).distance(a, g, mask), np.abs(delta).sum(axis=1),
                               rtol=1e-12)
    np.testing.assert_allclose(RewardRule("chebyshev", 1.0).distance(a, g, mask),
                               np.abs(delta).max(axis=1), rtol=1e-12)
    tol = np.array([0.1, 0.2, 0.3, 0.4])
    np.testing.assert_allclose(RewardRule("box", tuple(tol)).distance(a, g, mask),
                               (np.abs(delta) / tol).max(axis=1), rtol=1e-12)
    am, gm = np.where(mask, a, 0.0), np.where(mask, g, 0.0)
    cos = 1 - (am * gm).sum(1) / np.sqrt((am * am).sum(1) * (gm * gm).sum(1))
    np.testing.assert_allclose(RewardRule("cosine", 1.0).distance(a, g, mask), np.clip(cos, 0, 2),
                               rtol=1e-9, atol=1e-12)
    lo, hi = np.array([-0.5, -np.inf, 0.0, -1.0]), np.array([0.5, 0.2, np.inf, 1.0])
    viol = np.maximum(lo - (a - g), (a - g) - hi)
    np.testing.assert_allclose(RewardRule("region", lower=tuple(lo), upper=tuple(hi)).distance(a, g, mask),
                               np.where(mask, viol, -np.inf).max(axis=1), rtol=1e-12)


finite = st.floats(-10, 10, allow_nan=False, allow_infinity=False, width=32)


@settings(max_examples=200, deadline=None)
@given(a=arrays(np.float32, (8, 3), elements=finite), g=arrays(np.float32, (8, 3), elements=finite),
       z=arrays(np.float32, (8,), elements=finite), rule_index=st.integers(0, 8))
def test_with_a_mask_over_x_y_changing_z_never_changes_the_scores(a, g, z, rule_index):
    """A goal constraining x and y only: whatever z the reached state or the goal has, the
    reward, reached flag and distance are the same."""
    rule = _rules(3)[rule_index]
    mask = np.array([[1, 1, 0]] * 8, np.uint8)
    base = score(rule, a, g, mask).columns()
    a2, g2 = a.copy(), g.copy()
    a2[:, 2] = z
    g2[:, 2] = z[::-1]
    moved = score(rule, a2, g2, mask).columns()
    for name in base:
        assert base[name].tobytes() == moved[name].tobytes(), name


@pytest.mark.parametrize("masked", [False, True])
def test_published_fetch_rule_on_100000_pairs(masked):
    """reward -(d > 0.05) and success d < 0.05 (Plappert et al., 2018, sec. 1; from memory):
    goalkit's euclidean rule with threshold 0.05, sparse-negative and inclusive gives the
    reward, and the same rule with inclusive = false gives the success flag. With a mask, the
    published rule is applied to the masked coordinates only (the goal is their projection,
    Andrychowicz et al., 2017, the goal map m: S -> G)."""
    n = 100_000
    a = RNG.uniform(-0.1, 0.1, size=(n, 3))
    g = a + RNG.normal(scale=0.04, size=(n, 3))
    g[:50] = a[:50] + np.array([0.05, 0.0, 0.0])  # exactly on the threshold
    mask = np.ones((n, 3), bool)
    if masked:
        mask[:, 2] = False  # goals over x-y only (z free)
        g[::7, 2] += 5.0
    ref_reward, ref_success = fetch_reward_and_success(np.where(mask, a, 0.0), np.where(mask, g, 0.0),
                                                       fetch_threshold())
    ours = score(RewardRule("euclidean", fetch_threshold(), form="sparse-negative"), a, g, mask)
    strict = score(RewardRule("euclidean", fetch_threshold(), inclusive=False), a, g, mask)
    np.testing.assert_array_equal(ours.reward, ref_reward)
    np.testing.assert_array_equal(strict.reached, ref_success)
    assert 0.2 < ref_success.mean() < 0.9


def test_region_one_sided_bound_matches_the_inequality():
    g = np.full((7, 1), 0.45)
    a = np.array([[0.44], [0.449999], [0.45], [0.4500001], [0.6], [-1.2], [0.45]])
    rule = RewardRule("region", lower=(0.0,), upper=(math.inf,))
    assert rule.reached(a, g).tolist() == (a[:, 0] - g[:, 0] >= 0).tolist()
    strict = rule.replace(inclusive=False)
    assert strict.reached(a, g).tolist() == (a[:, 0] - g[:, 0] > 0).tolist()
    # the threshold moves the bound: reached iff delta >= -0.01
    assert rule.replace(threshold=0.01).reached(a, g).tolist() == (a[:, 0] - g[:, 0] >= -0.01).tolist()


def test_region_from_table_and_describe_round_trip():
    rule = RewardRule.from_table({"distance": "region", "lower": [0.0, -math.inf], "upper": [math.inf, 0.2]})
    assert rule.threshold == 0.0 and rule.lower == (0.0, -math.inf)
    assert RewardRule.from_table(rule.describe()) == rule


@pytest.mark.parametrize("table, key, words", [
    ({"distance": "region", "lower": [0.5], "upper": [0.1]}, "reward.lower", "lower 0.5 above upper 0.1"),
    ({"distance": "region", "lower": [0.0]}, "reward.upper", "needs upper"),
    ({"distance": "region", "lower": [0.0, 1.0], "upper": [1.0]}, "reward.upper", "as many"),
    ({"distance": "region", "lower": [math.inf], "upper": [math.inf]}, "reward.lower", "not empty"),
    ({"distance": "region", "lower": [0.0], "upper": [1.0], "form": "negative-distance"}, "reward.form",
     "sparse"),
    ({"distance": "euclidean", "threshold": 0.1, "lower": [0.0]}, "reward.lower", "need distance"),
    ({"distance": "region", "lower": ["a"], "upper": [1.0]}, "reward.lower", "list of numbers"),
])
def test_bad_region_tables_name_file_and_key(table, key, words):
    with pytest.raises(ParameterError) as info:      # the rule names its own parameter ...
        RewardRule.from_table(table)
    err = info.value.in_recipe("r.toml", "reward")   # ... and the recipe loader adds file and key
    assert err.file == "r.toml" and err.key == key and words in err.message


def test_region_check_dim():
    with pytest.raises(ParameterError, match="expected 3 bounds"):
        RewardRule("region", lower=(0.0,), upper=(1.0,)).check_dim(3)
