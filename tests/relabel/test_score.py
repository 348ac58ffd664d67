"""One scorer: reward.score gives distance -> reached -> reward -> terminal.

References: the sparse rule of the multi-goal robotics environments of Plappert et al. (2018),
"Multi-Goal Reinforcement Learning: Challenging Robotics Environments and Request for Research",
section 2: reward ``-(d > threshold)`` (inclusive: 0 at d = threshold), success ``d < threshold``
(strict); restated from memory. Distances against ``scipy.spatial.distance``.
"""

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from goalkit.reward import RewardRule, score, within

A = np.array([[0.0, 0.0], [3.0, 4.0], [6.0, 8.0], [10.0, 0.0]])   # exact distances
G = np.zeros_like(A)


def test_sparse_negative_inclusive_matches_the_published_reward():
    s = score(RewardRule("euclidean", 5.0, form="sparse-negative"), A, G)
    d = np.diag(cdist(A, G))   # 0, 5, 10, 10
    assert np.array_equal(s.distance, d)
    assert s.reward.tolist() == (-(d > 5.0).astype(np.float32)).tolist() == [0.0, 0.0, -1.0, -1.0]
    assert s.reward.dtype == np.float32
    # the strict comparison is the published success flag, goalkit's inclusive = false
    strict = score(RewardRule("euclidean", 5.0, inclusive=False), A, G)
    assert strict.reached.tolist() == (d < 5.0).tolist() == [True, False, False, False]


@pytest.mark.parametrize("end_on_reach", [True, False])
def test_terminal_follows_end_on_reach_and_the_columns_have_the_stored_dtypes(end_on_reach):
    rule = RewardRule("l1", 10.0, form="negative-distance", end_on_reach=end_on_reach)
    s = score(rule, A, G)
    d = np.diag(cdist(A, G, "cityblock"))   # 0, 7, 14, 10
    assert np.array_equal(s.distance, d)
    assert s.reached.tolist() == [True, True, False, True]
    assert s.terminal.tolist() == ([True, True, False, True] if end_on_reach else [False] * 4)
    assert np.array_equal(s.terminal, rule.terminal(A, G))
    cols = s.columns()
    assert list(cols) == ["goal_distance", "reward", "reached", "terminal"]
    assert [c.dtype for c in cols.values()] == [np.float32, np.float32, np.uint8, np.uint8]
    assert np.array_equal(cols["reward"], (-d).astype(np.float32))


def test_within_broadcasts_one_distance_over_many_thresholds():
    d = np.array([0.1, 0.2])
    assert within(d[:, None], np.array([0.1, 0.2])[None, :], True).tolist() == [[True, True], [False, True]]
    assert within(d[:, None], np.array([0.1, 0.2])[None, :], False).tolist() == [[False, True], [False, False]]
