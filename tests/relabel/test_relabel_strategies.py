"""Relabelling strategies: laws of the goal offsets (chi-square vs scipy) and index properties."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from goalkit.errors import StrategyError
from goalkit.relabel import (RelabelContext, episode, final, future, geometric, geometric_offsets,
                             original, other_episode)
from goalkit.relabel.strategies import episode_positions
from relabel_testdata import make_set


def one_transition_many_slots(lengths, episode_pos, t, n):
    """Transition t of episode position episode_pos, asked for n slots."""
    chunk = make_set(lengths)
    tr = np.full(n, chunk.offsets[episode_pos] + t, dtype=np.int64)
    return chunk, tr, np.arange(n, dtype=np.int64)


def pooled_chisquare(observed_counts, expected_probs):
    expected = np.asarray(expected_probs) * np.sum(observed_counts)
    return stats.chisquare(observed_counts, expected).pvalue


# ---- laws -------------------------------------------------------------------------------
def test_future_offsets_are_uniform():
    # future: j uniform on {t+1..T} (hindsight "future" strategy, Andrychowicz et al., 2017,
    # arXiv:1707.01495, sec. 3.4 / 4.5; law checked with scipy.stats.chisquare)
    T, t, n = 20, 5, 6000
    chunk, tr, slots = one_transition_many_slots([7, T, 3], 1, t, n)
    got = future(chunk, tr, slots, seed=3)
    assert np.all(got.goal_episode == 1)
    counts = np.bincount(got.goal_step - t, minlength=T - t + 1)
    assert counts[0] == 0 and counts.sum() == n
    p = pooled_chisquare(counts[1:], np.full(T - t, 1.0 / (T - t)))
    assert p > 0.01
    # the test has power: an off-by-one law on {t..T} is rejected
    wrong = np.full(T - t + 1, 1.0 / (T - t + 1))
    assert stats.chisquare(counts, wrong * n).pvalue < 0.01


def test_episode_steps_are_uniform():
    T, t, n = 12, 4, 5000
    chunk, tr, slots = one_transition_many_slots([T], 0, t, n)
    got = episode(chunk, tr, slots, seed=8)
    counts = np.bincount(got.goal_step, minlength=T + 1)
    assert len(counts) == T + 1
    assert pooled_chisquare(counts, np.full(T + 1, 1.0 / (T + 1))) > 0.01


def geometric_bins(k, p, last):
    """Counts and scipy.stats.geom probabilities for bins 1..last-1 and a pooled tail >= last."""
    counts = np.array([np.sum(k == i) for i in range(1, last)] + [np.sum(k >= last)])
    probs = np.append(stats.geom.pmf(np.arange(1, last), p), stats.geom.sf(last - 1, p))
    return counts, probs


def test_geometric_offsets_follow_scipy_geom():
    # K ~ Geometric(1 - gamma) on {1, 2, ...}: scipy.stats.geom(p) has pmf (1-p)^(k-1) p on k >= 1
    gamma, n = 0.8, 20000
    chunk, tr, slots = one_transition_many_slots([10_000], 0, 0, n)
    k = geometric(chunk, tr, slots, seed=5, gamma=gamma).goal_step
    counts, probs = geometric_bins(k, 1 - gamma, 16)
    assert pooled_chisquare(counts, probs) > 0.01
    # power: gamma 0.75 is rejected at this sample size
    _, wrong = geometric_bins(k, 0.25, 16)
    assert stats.chisquare(counts, wrong * n).pvalue < 0.01
    assert abs(k.mean() - 1 / (1 - gamma)) < 0.15


def test_geometric_inverse_cdf_matches_scipy_ppf():
    # our inverse CDF against scipy.stats.geom.ppf on a grid of uniforms (away from bin edges)
    u = (np.arange(1, 2000) + 0.5) / 2000
    for gamma in (0.3, 0.9, 0.99):
        np.testing.assert_array_equal(geometric_offsets(u, gamma), stats.geom.ppf(u, 1 - gamma))


def test_geometric_past_end_clip_and_truncate():
    gamma, T, t, n = 0.7, 8, 3, 20000
    chunk, tr, slots = one_transition_many_slots([T], 0, t, n)
    room = T - t
    clip = geometric(chunk, tr, slots, seed=2, gamma=gamma, past_end="clip").goal_step
    assert clip.min() >= t + 1 and clip.max() == T
    # clip: P(j = T) = P(K >= room) = geom.sf(room - 1)
    at_end = int(np.sum(clip == T))
    assert stats.binomtest(at_end, n, stats.geom.sf(room - 1, 1 - gamma)).pvalue > 0.01
    # below the end the law is the untouched geometric
    counts = np.array([np.sum(clip - t == i) for i in range(1, room + 1)])
    probs = np.append(stats.geom.pmf(np.arange(1, room), 1 - gamma), stats.geom.sf(room - 1, 1 - gamma))
    assert pooled_chisquare(counts, probs) > 0.01
    # truncate: K conditioned on K <= room, pmf(k) / cdf(room)
    trunc = geometric(chunk, tr, slots, seed=2, gamma=gamma, past_end="truncate").goal_step
    assert trunc.min() >= t + 1 and trunc.max() <= T
    counts = np.array([np.sum(trunc - t == i) for i in range(1, room + 1)])
    probs = stats.geom.pmf(np.arange(1, room + 1), 1 - gamma) / stats.geom.cdf(room, 1 - gamma)
    assert pooled_chisquare(counts, probs) > 0.01
    # and it differs from clip: clip piles mass on T
    assert at_end > 1.3 * np.sum(trunc == T)


def test_other_episode_uniform_over_the_split():
    lengths = [4, 6, 3, 5, 2, 7]
    codes = [0, 1, 0, 0, 1, 0]
    ctx = RelabelContext.from_lengths(lengths, codes)
    chunk = make_set(lengths)
    n = 8000
    tr = np.full(n, chunk.offsets[2] + 1)  # episode 2 (split 0), t = 1
    got = other_episode(chunk, tr, np.arange(n), 4, ctx)
    counts = np.bincount(got.goal_episode, minlength=6)
    assert counts[[1, 2, 4]].sum() == 0  # other split, own episode
    assert pooled_chisquare(counts[[0, 3, 5]], np.full(3, 1 / 3)) > 0.01
    steps = got.goal_step[got.goal_episode == 5]
    assert pooled_chisquare(np.bincount(steps, minlength=8), np.full(8, 1 / 8)) > 0.01


# ---- index properties on random layouts ---------------------------------------------------
@st.composite
def layouts(draw):
    e = draw(st.integers(2, 9))
    lengths = draw(st.lists(st.integers(1, 12), min_size=e, max_size=e))
    codes = draw(st.lists(st.integers(0, 1), min_size=e, max_size=e))
    for c in (0, 1):  # every split used has at least two episodes
        if codes.count(c) == 1:
            codes[codes.index(c)] = 1 - c
    seed = draw(st.integers(0, 2**40))
    return lengths, codes, seed


def state_owner_and_step(chunk_all, goal_episode, goal_step):
    """Read back (episode id, step) stored in the goal state's observation row."""
    pos = chunk_all.position_of(goal_episode)
    assert np.all(goal_step >= 0)
    assert np.all(goal_step <= chunk_all.lengths[pos])
    rows = chunk_all.state_row(pos, goal_step)
    return chunk_all.observations[rows, 1].astype(int), chunk_all.observations[rows, 0].astype(int)


@settings(max_examples=60, deadline=None)
@given(layouts(), st.integers(1, 3))
def test_strategy_indices_stay_in_their_episode(layout, k):
    lengths, codes, seed = layout
    chunk = make_set(lengths)
    ctx = RelabelContext.from_lengths(lengths, codes)
    tr = np.repeat(np.arange(chunk.num_transitions), k)
    slots = np.tile(np.arange(k), chunk.num_transitions)
    own = chunk.episode_ids[chunk.transition_episode()][tr]
    t = chunk.transition_step()[tr]
    T = chunk.lengths[chunk.transition_episode()][tr]
    for fn, opts in ((final, {}), (future, {}), (episode, {}),
                     (geometric, {"gamma": 0.6}), (geometric, {"gamma": 0.95, "past_end": "truncate"})):
        got = fn(chunk, tr, slots, seed, ctx, **opts)
        assert np.array_equal(got.goal_episode, own)
        owner, step = state_owner_and_step(chunk, got.goal_episode, got.goal_step)
        assert np.array_equal(owner, own) and np.array_equal(step, got.goal_step)
        if fn is final:
            assert np.array_equal(got.goal_step, T)
        elif fn is episode:
            assert got.goal_step.min() >= 0 and np.all(got.goal_step <= T)
        else:  # future and geometric: strictly after t, at most T
            assert np.all(got.goal_step >= t + 1) and np.all(got.goal_step <= T)
    got = other_episode(chunk, tr, slots, seed, ctx)
    assert np.all(got.goal_episode != own)
    assert np.array_equal(ctx.split_codes(got.goal_episode), ctx.split_codes(own))
    owner, step = state_owner_and_step(chunk, got.goal_episode, got.goal_step)
    assert np.array_equal(owner, got.goal_episode)
    got = original(chunk, tr, slots, seed, ctx)
    assert np.all(got.goal_episode == -1) and np.all(got.goal_step == -1)
    np.testing.assert_array_equal(got.external, chunk.task_goals[tr])


@settings(max_examples=40, deadline=None)
@given(layouts())
def test_strategies_do_not_depend_on_the_rows_asked_for(layout):
    # a minibatch asked for on its own gets the same goals as inside the whole set
    lengths, codes, seed = layout
    whole = make_set(lengths)
    ctx = RelabelContext.from_lengths(lengths, codes)
    n = whole.num_transitions
    tr = np.arange(n)
    pick = np.arange(n)[::3][::-1].copy()
    for fn in (future, episode, geometric, other_episode):
        full = fn(whole, tr, np.zeros(n, np.int64), seed, ctx)
        part = fn(whole, pick, np.zeros(len(pick), np.int64), seed, ctx)
        assert np.array_equal(full.goal_step[pick], part.goal_step)
        assert np.array_equal(full.goal_episode[pick], part.goal_episode)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 6), min_size=1, max_size=12), st.data())
def test_episode_positions_equal_a_search_of_the_offsets(lengths, data):
    # the sorted fast path and the general path agree with numpy's own search, including
    # repeated indices and empty episodes (which own no transition)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    n = int(offsets[-1])
    if n == 0:
        return
    idx = np.asarray(data.draw(st.lists(st.integers(0, n - 1), min_size=1, max_size=40)), np.int64)
    for tr in (idx, np.sort(idx)):
        want = np.searchsorted(offsets, tr, side="right") - 1
        got = episode_positions(offsets, tr)
        assert np.array_equal(got, want)
        assert np.all(offsets[got] <= tr) and np.all(tr < offsets[got + 1])


def test_original_without_task_goals_is_a_strategy_error_naming_the_log():
    chunk = make_set([3, 4], with_task_goals=False)
    with pytest.raises(StrategyError, match="task_goal") as info:
        original(chunk, np.arange(3), np.zeros(3, np.int64), 0)
    # a domain error: the log file, no recipe key (the build plan refuses it earlier, with the key)
    assert info.value.key is None and info.value.file == "bench-log.h5"


def test_other_episode_needs_two_episodes_in_the_split():
    chunk = make_set([3, 4])
    ctx = RelabelContext.from_lengths([3, 4], [0, 1])
    with pytest.raises(StrategyError, match="at least two episodes") as info:
        other_episode(chunk, np.arange(3), np.zeros(3, np.int64), 0, ctx)
    assert info.value.episode == 0


def test_geometric_rejects_bad_options():
    chunk = make_set([3])
    with pytest.raises(ValueError):
        geometric(chunk, np.arange(3), np.zeros(3, np.int64), 0, gamma=1.0)
    with pytest.raises(ValueError):
        geometric(chunk, np.arange(3), np.zeros(3, np.int64), 0, past_end="wrap")


def test_split_of_may_be_a_function():
    ctx = RelabelContext({0: [0, 2, 4], 1: [1, 3]}, {0: [2, 2, 2], 1: [2, 2]}, lambda ids: ids % 2)
    chunk = make_set([2, 2, 2, 2, 2])
    got = other_episode(chunk, np.arange(10), np.zeros(10, np.int64), 1, ctx)
    own = chunk.episode_ids[chunk.transition_episode()]
    assert np.all(got.goal_episode % 2 == own % 2) and np.all(got.goal_episode != own)
