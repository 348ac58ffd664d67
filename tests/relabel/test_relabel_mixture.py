"""Mixture.assign: strategy shares, row order, steps_to_goal, chunking invariance."""

import json

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from goalkit.relabel import CODES, Mixture, RelabelContext
from relabel_testdata import make_set


def her_future_k4():
    return Mixture({"original": 1, "future": 4}, goals_per_transition=4)


def test_her_future_k4_share_of_relabelled_goals():
    # Andrychowicz et al. (2017, arXiv:1707.01495), sec. 4.5 / fig. 6, value from memory: the
    # best setting is "future" with k = 4, i.e. 4 relabelled goals per original goal, so a
    # share 4 / (1 + 4) = 0.8 of the goals is relabelled. Checked with scipy.stats.binomtest.
    lengths = [300, 450, 120, 600, 250]
    chunk = make_set(lengths)
    rows = her_future_k4().assign(chunk, 2024, RelabelContext.from_lengths(lengths))
    n = len(rows)
    assert n == chunk.num_transitions * 4
    relabelled = int(np.sum(rows.strategy == CODES["future"]))
    assert relabelled + int(np.sum(rows.strategy == CODES["original"])) == n
    assert stats.binomtest(relabelled, n, 0.8).pvalue > 0.01
    assert stats.binomtest(relabelled, n, 0.5).pvalue < 0.01  # the check has power
    assert stats.binomtest(relabelled, n, 0.75).pvalue < 0.01


def test_three_way_shares():
    lengths = [40] * 20
    chunk = make_set(lengths)
    mix = Mixture({"final": 1, "episode": 2, "geometric": 3}, goals_per_transition=3)
    rows = mix.assign(chunk, 7, RelabelContext.from_lengths(lengths))
    counts = [int(np.sum(rows.strategy == CODES[s])) for s in ("final", "episode", "geometric")]
    # scipy.stats.chisquare against the normalised weights 1/6, 2/6, 3/6
    assert stats.chisquare(counts, np.array([1, 2, 3]) / 6 * len(rows)).pvalue > 0.01
    assert mix.probabilities() == {"final": 1 / 6, "episode": 2 / 6, "geometric": 3 / 6}


def test_rows_sorted_and_typed():
    lengths = [5, 3, 8]
    chunk = make_set(lengths)
    mix = Mixture({"original": 1, "future": 1, "final": 1, "other_episode": 1},
                  goals_per_transition=3)
    rows = mix.assign(chunk, 0, RelabelContext.from_lengths(lengths))
    key = rows.transition * 3 + rows.slot
    assert np.array_equal(key, np.arange(len(rows)))
    assert rows.strategy.dtype == np.uint8
    for name in ("transition", "slot", "goal_episode", "goal_step", "hop_episode", "hop_step",
                 "steps_to_goal"):
        assert getattr(rows, name).dtype == np.int64
    assert np.all(rows.hop_episode == -1) and np.all(rows.hop_step == -1)
    ext = rows.goal_episode == -1
    assert np.array_equal(ext, rows.strategy == CODES["original"])
    np.testing.assert_array_equal(rows.external[ext], chunk.task_goals[rows.transition[ext]])
    assert np.all(np.isnan(rows.external[~ext]))


def test_steps_to_goal():
    lengths = [6, 9]
    chunk = make_set(lengths)
    mix = Mixture({"future": 1, "episode": 1, "other_episode": 1, "original": 1},
                  goals_per_transition=4)
    rows = mix.assign(chunk, 3, RelabelContext.from_lengths(lengths))
    pos = chunk.transition_episode()[rows.transition]
    t = chunk.transition_step()[rows.transition]
    own = chunk.episode_ids[pos]
    fut = rows.strategy == CODES["future"]
    assert np.array_equal(rows.steps_to_goal[fut], rows.goal_step[fut] - t[fut])
    assert np.all(rows.steps_to_goal[fut] >= 1)
    other = (rows.strategy == CODES["other_episode"]) | (rows.strategy == CODES["original"])
    assert np.all(rows.steps_to_goal[other] == -1)
    ep = rows.strategy == CODES["episode"]
    later = ep & (rows.goal_step > t)
    assert np.array_equal(rows.steps_to_goal[later], rows.goal_step[later] - t[later])
    assert np.all(rows.steps_to_goal[ep & ~later] == -1)
    assert np.all(rows.goal_episode[ep] == own[ep])


def test_table_order_does_not_change_the_rows():
    lengths = [7, 7, 7]
    chunk = make_set(lengths)
    ctx = RelabelContext.from_lengths(lengths)
    a = Mixture({"future": 4, "original": 1}).assign(chunk, 9, ctx)
    b = Mixture({"original": 1, "future": 4, "final": 0}).assign(chunk, 9, ctx)
    assert np.array_equal(a.strategy, b.strategy) and np.array_equal(a.goal_step, b.goal_step)
    c = Mixture({"original": 1, "future": 4}).assign(chunk, 10, ctx)
    assert not np.array_equal(a.goal_step, c.goal_step)  # the seed matters


def test_describe_round_trip():
    mix = Mixture.from_table({"goals_per_transition": 5, "gamma": 0.95, "past_end": "truncate",
                              "weights": {"original": 1, "geometric": 4}})
    d = mix.describe()
    assert json.loads(json.dumps(d)) == d
    assert Mixture.from_table(d) == mix
    assert Mixture.from_table({}) == Mixture({"future": 1.0}, 4, 0.9, "clip")


def assert_rows_equal(a, b):
    for name in ("transition", "slot", "strategy", "goal_episode", "goal_step", "hop_episode",
                 "hop_step", "steps_to_goal"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    assert (a.external is None) == (b.external is None)
    if a.external is not None:
        np.testing.assert_array_equal(a.external, b.external)  # NaN == NaN here


def concat_rows(parts, shifts):
    from goalkit.relabel import GoalRows
    ext = [p.external for p in parts]
    return GoalRows(
        transition=np.concatenate([p.transition + s for p, s in zip(parts, shifts)]),
        slot=np.concatenate([p.slot for p in parts]),
        strategy=np.concatenate([p.strategy for p in parts]),
        goal_episode=np.concatenate([p.goal_episode for p in parts]),
        goal_step=np.concatenate([p.goal_step for p in parts]),
        external=None if ext[0] is None else np.concatenate(ext),
        hop_episode=np.concatenate([p.hop_episode for p in parts]),
        hop_step=np.concatenate([p.hop_step for p in parts]),
        steps_to_goal=np.concatenate([p.steps_to_goal for p in parts]))


@settings(max_examples=50, deadline=None)
@given(st.lists(st.integers(1, 10), min_size=2, max_size=8), st.data())
def test_chunking_invariance(lengths, data):
    # assign on the whole set == assign on two chunks (episode ids stable across chunks)
    cut = data.draw(st.integers(1, len(lengths) - 1))
    seed = data.draw(st.integers(0, 2**50))
    k = data.draw(st.integers(1, 4))
    codes = [0] * len(lengths)
    whole = make_set(lengths)
    ctx = RelabelContext.from_lengths(lengths, codes)
    mix = Mixture({"original": 1, "final": 1, "future": 2, "episode": 1, "geometric": 2,
                   "other_episode": 1}, goals_per_transition=k, gamma=0.7)
    full = mix.assign(whole, seed, ctx)
    left, right = whole.select(0, cut), whole.select(cut, len(lengths))
    parts = [mix.assign(left, seed, ctx), mix.assign(right, seed, ctx)]
    assert_rows_equal(full, concat_rows(parts, [0, left.num_transitions]))
    # and a minibatch of transitions gets the same rows as in the whole set
    pick = np.sort(data.draw(st.lists(st.integers(0, whole.num_transitions - 1), max_size=6,
                                      unique=True)))
    sub = mix.assign(whole, seed, ctx, transitions=np.array(pick, dtype=np.int64))
    sel = np.isin(full.transition, pick)
    assert np.array_equal(sub.goal_step, full.goal_step[sel])
    assert np.array_equal(sub.strategy, full.strategy[sel])
