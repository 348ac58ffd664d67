"""Labelled pairs: the file formats (our own, see goalkit/thresholds/labels.py) and the logs' own labels.

The index convention checked here is the project's (docs/internals.md): transition t of an
episode pairs phi(s_{t+1}) with the task goal of step t, labelled success[t].
"""

import numpy as np
import pytest

from goalkit.errors import LabelError
from goalkit.goals.goalmap import IndexGoalMap
from goalkit.logs.episodes import EpisodeSet
from goalkit.thresholds.labels import concat_pairs, load_labelled_pairs, pairs_from_success


def _arrays(m=6, g=3, seed=0):
    r = np.random.default_rng(seed)
    return (r.normal(size=(m, g)), r.normal(size=(m, g)), r.integers(0, 2, m), r.integers(0, 3, m))


def test_npz_round_trip(tmp_path):
    a, gl, y, e = _arrays()
    p = tmp_path / "pairs.npz"
    np.savez(p, achieved=a, goal=gl, reached=y.astype(bool), episode=e)
    pairs = load_labelled_pairs(p)
    np.testing.assert_array_equal(pairs.achieved, a)
    np.testing.assert_array_equal(pairs.goal, gl)
    np.testing.assert_array_equal(pairs.reached, y.astype(bool))
    np.testing.assert_array_equal(pairs.groups, e)
    assert pairs.grouped and pairs.dim == 3 and pairs.size == 6
    np.savez(p, achieved=a, goal=gl, reached=y)  # without episodes: one group per pair
    pairs = load_labelled_pairs(p)
    assert not pairs.grouped and np.array_equal(pairs.groups, np.arange(6))


def _write_csv(path, header, rows):
    path.write_text(",".join(header) + "\n" + "".join(",".join(map(str, r)) + "\n" for r in rows))


def test_csv_round_trip_with_columns_in_any_order(tmp_path):
    a, gl, y, e = _arrays(m=4, g=2)
    header = ["reached", "goal_1", "achieved_0", "episode", "goal_0", "achieved_1"]
    rows = [[y[i], repr(float(gl[i, 1])), repr(float(a[i, 0])), e[i], repr(float(gl[i, 0])), repr(float(a[i, 1]))]
            for i in range(4)]
    p = tmp_path / "pairs.csv"
    _write_csv(p, header, rows)
    pairs = load_labelled_pairs(p)
    np.testing.assert_array_equal(pairs.achieved, a)
    np.testing.assert_array_equal(pairs.goal, gl)
    np.testing.assert_array_equal(pairs.reached, y.astype(bool))
    np.testing.assert_array_equal(pairs.groups, e)


@pytest.mark.parametrize("header,rows,match", [
    (["achieved_0", "goal_0", "reached"], [[0.1, 0.2, 1], [0.1, 0.2, 2]], r"pairs.csv: key reached: line 3: expected 0 or 1"),
    (["achieved_0", "goal_0", "reached"], [[0.1, "x", 1]], r"key goal_0: line 2: expected a number, got 'x'"),
    (["achieved_0", "goal_0", "reached"], [[0.1, 0.2]], r"line 2: expected 3 values, got 2"),
    (["achieved_0", "goal_0"], [[0.1, 0.2]], r"key reached: missing column"),
    (["achieved_0", "achieved_2", "goal_0", "goal_1", "reached"], [[0, 0, 0, 0, 1]], r"key achieved_1: missing column"),
    (["achieved_0", "goal_0", "reached", "colour"], [[0, 0, 1, 3]], r"key colour: unexpected column"),
    (["achieved_0", "goal_0", "reached", "episode"], [[0, 0, 1, 1.5]], r"key episode: line 2: expected an integer"),
    (["achieved_0", "goal_0", "reached"], [[0, "nan", 1]], r"key goal: line 2: expected finite"),
])
def test_csv_errors_name_file_column_and_line(tmp_path, header, rows, match):
    p = tmp_path / "pairs.csv"
    _write_csv(p, header, rows)
    with pytest.raises(LabelError, match=match):
        load_labelled_pairs(p)


def test_npz_errors_name_file_key_and_row(tmp_path):
    a, gl, y, e = _arrays()
    p = tmp_path / "pairs.npz"
    np.savez(p, achieved=a, goal=gl)
    with pytest.raises(LabelError, match=r"pairs.npz: key reached: missing array"):
        load_labelled_pairs(p)
    y2 = y.copy(); y2[4] = 3
    np.savez(p, achieved=a, goal=gl, reached=y2)
    with pytest.raises(LabelError, match=r"key reached: row 4: expected 0 or 1, got 3"):
        load_labelled_pairs(p)
    np.savez(p, achieved=a, goal=gl[:, :2], reached=y)
    with pytest.raises(LabelError, match=r"key goal: expected shape \(6, 3\)"):
        load_labelled_pairs(p)
    np.savez(p, achieved=a, goal=gl, reached=y, weight=y)
    with pytest.raises(LabelError, match=r"key weight: unknown array"):
        load_labelled_pairs(p)
    with pytest.raises(LabelError, match="file not found"):
        load_labelled_pairs(tmp_path / "missing.npz")
    (tmp_path / "pairs.txt").write_text("x")
    with pytest.raises(LabelError, match="expected a .npz or .csv"):
        load_labelled_pairs(tmp_path / "pairs.txt")


def _episodes():
    # Two episodes (T = 3 and T = 2); observation = [100 * episode id + step, -step].
    lengths, ids = [3, 2], [7, 9]
    obs = np.concatenate([np.c_[100 * i + np.arange(t + 1), -np.arange(t + 1)] for i, t in zip(ids, lengths)])
    goals = np.arange(10.0).reshape(5, 2)
    return EpisodeSet(observations=obs.astype(float), actions=np.zeros((5, 1)), offsets=np.array([0, 3, 5]),
                      episode_ids=np.array(ids), success=np.array([0, 0, 1, 0, 1], bool),
                      task_goals=goals, source="bench.h5")


def test_pairs_from_success_pairs_next_state_with_task_goal():
    ep = _episodes()
    pairs = pairs_from_success(ep, IndexGoalMap((0, 1)))
    # transition t of episode id i reaches s_{t+1} = [100 i + t + 1, -(t + 1)]
    want = np.array([[701, -1], [702, -2], [703, -3], [901, -1], [902, -2]], float)
    np.testing.assert_array_equal(pairs.achieved, want)
    np.testing.assert_array_equal(pairs.goal, ep.task_goals)
    np.testing.assert_array_equal(pairs.reached, ep.success)
    np.testing.assert_array_equal(pairs.groups, [7, 7, 7, 9, 9])
    both = concat_pairs([pairs_from_success(ep.select(0, 1), IndexGoalMap((0, 1))),
                         pairs_from_success(ep.select(1, 2), IndexGoalMap((0, 1)))])
    np.testing.assert_array_equal(both.achieved, pairs.achieved)
    np.testing.assert_array_equal(both.groups, pairs.groups)


def test_pairs_from_success_needs_goals_flags_and_matching_width():
    ep = _episodes()
    from dataclasses import replace
    with pytest.raises(LabelError, match=r"bench.h5: key task_goal: the logs carry no task goals"):
        pairs_from_success(replace(ep, task_goals=None), IndexGoalMap((0, 1)))
    with pytest.raises(LabelError, match=r"key success"):
        pairs_from_success(replace(ep, success=None), IndexGoalMap((0, 1)))
    with pytest.raises(LabelError, match=r"expected task goals of width 1"):
        pairs_from_success(ep, IndexGoalMap((0,)))
