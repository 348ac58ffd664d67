"""Label-free diagnostics: exact values on straight-line motion, neighbours against scipy's cdist.

Outside reference for the nearest other-episode state: brute force with
``scipy.spatial.distance.cdist`` (SciPy), compared with the faiss IndexFlatL2 search.
"""

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from goalkit.goals.goalmap import IndexGoalMap
from goalkit.logs.episodes import EpisodeSet
from goalkit.reward import RewardRule
from goalkit.thresholds.diagnostics import (diagnose, horizon_displacement, other_episode_distances,
                                      rewarded_fraction, sample_states, step_displacement)

EUC = RewardRule("euclidean", 0.05)


def _lines(lengths=(5, 3, 8), speeds=(0.1, 0.2, 0.05)):
    # Nozzle head moving in a straight line at a constant speed per episode: s_t = t * v * u.
    u = np.array([0.6, 0.8, 0.0])                         # unit direction
    obs = np.concatenate([np.arange(t + 1)[:, None] * v * u for t, v in zip(lengths, speeds)])
    offsets = np.r_[0, np.cumsum(lengths)]
    return EpisodeSet(observations=obs, actions=np.zeros((offsets[-1], 1)), offsets=offsets,
                      episode_ids=np.arange(len(lengths)) + 10)


def test_step_and_horizon_displacement_on_straight_lines():
    ep = _lines()
    gm = IndexGoalMap((0, 1, 2))
    step = step_displacement(ep, gm, EUC)
    np.testing.assert_allclose(step, np.repeat([0.1, 0.2, 0.05], [5, 3, 8]), rtol=1e-12)
    prof = horizon_displacement(ep, gm, EUC, horizons=[1, 4, 6, 9], quantiles=[0.0, 1.0])
    # after h steps an episode of speed v has moved h v, for its T - h + 1 start steps
    assert prof.counts.tolist() == [5 + 3 + 8, 2 + 0 + 5, 0 + 0 + 3, 0]
    np.testing.assert_allclose(prof.values[:3], [[0.05, 0.2], [0.2, 0.4], [0.3, 0.3]], rtol=1e-12)
    assert np.all(np.isnan(prof.values[3]))
    l1 = step_displacement(ep, gm, RewardRule("l1", 0.05))  # the rule's distance is used
    np.testing.assert_allclose(l1, 1.4 * np.repeat([0.1, 0.2, 0.05], [5, 3, 8]), rtol=1e-12)


def _cloud(n_eps=30, t=20, seed=0):
    r = np.random.default_rng(seed)
    obs = np.cumsum(r.normal(0, 0.05, size=(n_eps * (t + 1), 3)), axis=0) + np.repeat(
        r.normal(size=(n_eps, 3)), t + 1, axis=0)
    offsets = np.arange(n_eps + 1) * t
    return EpisodeSet(observations=obs, actions=np.zeros((offsets[-1], 1)), offsets=offsets,
                      episode_ids=np.arange(n_eps))


def test_nearest_other_episode_state_matches_brute_force():
    ep = _cloud()
    gm = IndexGoalMap((0, 1, 2))
    res = other_episode_distances(ep, gm, RewardRule("l1", 0.1), sample=300, seed=4)
    g = ep.observations[res.rows]
    pos = np.repeat(np.arange(ep.num_episodes), ep.lengths + 1)[res.rows]
    full = cdist(g, g)                                    # scipy brute force
    full[pos[:, None] == pos[None, :]] = np.inf           # only states of other episodes
    np.testing.assert_allclose(res.euclidean, full.min(axis=1), rtol=1e-5)
    want = ep.observations[res.neighbour_rows]
    np.testing.assert_allclose(res.distance, np.abs(g - want).sum(axis=1), rtol=1e-12)
    assert res.rows.size == 300 and np.array_equal(res.rows, sample_states(ep, 300, seed=4))


def test_state_sample_is_addressed_by_episode_id_and_step():
    ep = _cloud(n_eps=6, t=5)
    whole = sample_states(ep, 10, seed=1)
    again = sample_states(ep, 10, seed=1)
    assert np.array_equal(whole, again) and not np.array_equal(whole, sample_states(ep, 10, seed=2))
    # a state's key does not depend on the chunk it is read in: sampling everything of the
    # second half and mapping back gives the same (id, step) order of keys
    half = ep.select(3, 6)
    from goalkit import rng
    keys_whole = rng.uniform(1, np.repeat(ep.episode_ids, 6), np.tile(np.arange(6), 6), 0, "subsample")
    keys_half = rng.uniform(1, np.repeat(half.episode_ids, 6), np.tile(np.arange(6), 3), 0, "subsample")
    np.testing.assert_array_equal(keys_whole[18:], keys_half)
    assert np.array_equal(sample_states(half, 100, seed=1), np.arange(18))


def test_single_episode_has_no_other_episode_neighbour():
    ep = _cloud(n_eps=1, t=10)
    res = other_episode_distances(ep, IndexGoalMap((0, 1, 2)), EUC, sample=50)
    assert np.all(res.neighbour_rows == -1) and np.all(np.isnan(res.distance))


@pytest.mark.parametrize("inclusive", [True, False])
def test_rewarded_fraction_matches_direct_counting(inclusive):
    r = np.random.default_rng(3)
    a = np.round(r.normal(size=(500, 2)), 1)
    g = np.round(r.normal(size=(500, 2)), 1)
    s = r.choice([0, 2, 5], size=500)
    rule = RewardRule("chebyshev", 0.5, inclusive=inclusive)
    thr = np.array([0.0, 0.1, 0.3, 0.5, 1.0, 3.0])
    res = rewarded_fraction(a, g, s, rule, thr)
    d = np.max(np.abs(a - g), axis=1)
    assert res.strategies.tolist() == [0, 2, 5]
    for i, code in enumerate([0, 2, 5]):
        dd = d[s == code]
        want = [np.mean(dd <= t) if inclusive else np.mean(dd < t) for t in thr]
        np.testing.assert_allclose(res.fraction[i], want, rtol=0, atol=1e-15)
        assert res.counts[i] == dd.size


@pytest.mark.parametrize("inclusive", [True, False])
def test_rewarded_fraction_with_unsorted_repeated_thresholds_and_given_distances(inclusive):
    r = np.random.default_rng(4)
    a = np.round(r.normal(size=(400, 3)), 1)
    g = np.round(r.normal(size=(400, 3)), 1)
    s = r.choice([7, 1, 300], size=400)
    rule = RewardRule("l1", 0.5, inclusive=inclusive)
    thr = np.array([2.0, 0.0, 0.5, 2.0, 9.9, 0.3, 0.5])   # unsorted, repeated, some equal to distances
    d = np.sum(np.abs(a - g), axis=1)                     # the L1 distance, written out here
    for res in (rewarded_fraction(a, g, s, rule, thr), rewarded_fraction(a, g, s, rule, thr, distances=d)):
        assert res.strategies.tolist() == [1, 7, 300]
        for i, code in enumerate([1, 7, 300]):
            dd = d[s == code]
            want = [np.mean(dd <= t) if inclusive else np.mean(dd < t) for t in thr]
            np.testing.assert_allclose(res.fraction[i], want, rtol=0, atol=1e-15)
            assert res.counts[i] == dd.size


def test_diagnose_summary_places_the_threshold():
    ep = _lines()
    d = diagnose(ep, IndexGoalMap((0, 1, 2)), RewardRule("euclidean", 0.15), horizons=[1, 2], sample=100)
    s = d.summary()
    assert s["fraction_steps_within_threshold"] == pytest.approx(13 / 16)  # speeds 0.1 and 0.05
    assert s["step_displacement"]["n"] == 16
    assert s["horizon_displacement"]["counts"] == [16, 13]


def test_threshold_warnings_fire_on_their_conditions():
    from goalkit.thresholds.diagnostics import threshold_warnings
    ep = _lines()
    gm = IndexGoalMap((0, 1, 2))
    small = diagnose(ep, gm, RewardRule("euclidean", 0.01), horizons=[1], sample=100).summary()
    assert any("below the 5% quantile" in w for w in threshold_warnings(small))
    # every episode starts at the origin, so other episodes' states are within any threshold
    # for the first steps; a huge threshold covers all of them
    big = diagnose(ep, gm, RewardRule("euclidean", 10.0), horizons=[1], sample=100).summary()
    assert big["fraction_other_episode_within_threshold"] == 1.0
    assert any("another episode" in w for w in threshold_warnings(big))
    # episodes far apart (starts 1.0 apart, at most 0.5 of travel): neither warning
    apart = EpisodeSet(observations=ep.observations + np.repeat([[0, 0, 0], [0, 0, 1.0], [0, 0, 2.0]],
                                                                [6, 4, 9], axis=0),
                       actions=ep.actions, offsets=ep.offsets, episode_ids=ep.episode_ids)
    fine = diagnose(apart, gm, RewardRule("euclidean", 0.25), horizons=[1], sample=100).summary()
    assert fine["fraction_other_episode_within_threshold"] == 0.0
    assert threshold_warnings(fine) == []


def test_rule_of_the_wrong_dimension_is_a_parameter_error():
    from goalkit.errors import ParameterError
    with pytest.raises(ParameterError, match="RewardRule threshold: expected 3 tolerances"):
        diagnose(_lines(), IndexGoalMap((0, 1, 2)), RewardRule("box", (0.1, 0.1)))
    with pytest.raises(ParameterError, match="RewardRule weights: expected 2 weights"):
        rewarded_fraction(np.zeros((3, 2)), np.zeros((3, 2)), [0, 0, 0],
                          RewardRule("l1", 0.1, weights=(1.0, 1.0, 1.0)), [0.1])
