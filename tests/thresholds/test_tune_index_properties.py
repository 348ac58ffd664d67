"""Hypothesis properties of the tuning's indexing and sampling rules.

Index convention: docs/internals.md (state t of episode position e is row offsets[e] + e + t;
transition t reaches s_{t+1}). Uniformity of the bootstrap draws is checked with Pearson's
chi-square test (scipy.stats.chisquare).
"""

import numpy as np
from hypothesis import given, settings, strategies as st
from scipy.stats import chisquare

from goalkit.goals.goalmap import IndexGoalMap
from goalkit.logs.episodes import EpisodeSet
from goalkit.reward import RewardRule
from goalkit.thresholds.bootstrap import resample_groups
from goalkit.thresholds.diagnostics import horizon_displacement, sample_states
from goalkit.thresholds.labels import pairs_from_success

lengths_st = st.lists(st.integers(1, 9), min_size=1, max_size=6)


def _encoded(lengths):
    # observation of state t of episode position e encodes (e, t) as [e, t]
    obs = np.concatenate([np.c_[np.full(t + 1, e), np.arange(t + 1)] for e, t in enumerate(lengths)]).astype(float)
    n = int(sum(lengths))
    r = np.random.default_rng(len(lengths))
    return EpisodeSet(observations=obs, actions=np.zeros((n, 1)), offsets=np.r_[0, np.cumsum(lengths)],
                      episode_ids=np.arange(len(lengths)) * 3 + 1, success=r.random(n) < 0.5,
                      task_goals=r.normal(size=(n, 2)))


@settings(max_examples=80, deadline=None)
@given(lengths_st)
def test_success_pairs_reach_the_next_state(lengths):
    ep = _encoded(lengths)
    pairs = pairs_from_success(ep, IndexGoalMap((0, 1)))
    e = np.repeat(np.arange(len(lengths)), lengths)
    t = np.concatenate([np.arange(n) for n in lengths])
    np.testing.assert_array_equal(pairs.achieved, np.c_[e, t + 1])
    np.testing.assert_array_equal(pairs.groups, ep.episode_ids[e])
    np.testing.assert_array_equal(pairs.reached, ep.success)


@settings(max_examples=80, deadline=None)
@given(lengths_st, st.lists(st.integers(1, 12), min_size=1, max_size=4))
def test_horizon_pairs_stay_inside_episodes(lengths, horizons):
    ep = _encoded(lengths)
    # goal = step only, so the distance after h steps inside an episode is exactly h
    prof = horizon_displacement(ep, IndexGoalMap((1,)), RewardRule("l1", 1.0), horizons, [0.0, 1.0])
    for i, h in enumerate(horizons):
        assert prof.counts[i] == sum(max(T - h + 1, 0) for T in lengths)
        if prof.counts[i]:
            assert prof.values[i].tolist() == [h, h]


@settings(max_examples=50, deadline=None)
@given(st.integers(1, 50), st.integers(1, 20), st.integers(0, 2**40), st.integers(0, 30))
def test_resample_draws_are_addressed_not_sequential(n_groups, n_resamples, seed, start):
    a = resample_groups(n_groups, n_resamples, seed, start)
    assert a.shape == (n_resamples, n_groups) and a.min() >= 0 and a.max() < n_groups
    np.testing.assert_array_equal(a, resample_groups(n_groups, start + n_resamples, seed)[start:])


def test_resample_draws_are_uniform_over_groups():
    draws = resample_groups(20, 2000, seed=11)            # 40 000 draws over 20 groups
    counts = np.bincount(draws.ravel(), minlength=20)
    assert chisquare(counts).pvalue > 1e-3


@settings(max_examples=50, deadline=None)
@given(lengths_st, st.integers(1, 40), st.integers(0, 1000))
def test_state_sample_is_a_subset_of_the_right_size(lengths, size, seed):
    ep = _encoded(lengths)
    rows = sample_states(ep, size, seed)
    n_states = sum(lengths) + len(lengths)
    assert rows.size == min(size, n_states)
    assert np.all(np.diff(rows) > 0) and rows.min() >= 0 and rows.max() < n_states
