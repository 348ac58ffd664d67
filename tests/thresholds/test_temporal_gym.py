"""Label-free threshold from the logs' temporal order, on Gymnasium recordings with overlapping episodes.

Recordings are made here with Gymnasium (MountainCar-v0 and Pendulum-v1, Gymnasium 1.x, random
actions; Farama Foundation). Random-action episodes of one environment run through the same
states again and again, which is what made the nearest-other-episode rule of thumb collapse.
The reference outside the project is the environments' own step structure: a pair of states one
logged step apart is one step apart, a pair ten or more steps apart is not (the recording's own
order); Youden's J is from Youden (1950).
"""

import numpy as np
import pytest

from goalkit.goals.goalmap import IndexGoalMap
from goalkit.logs.episodes import EpisodeSet
from goalkit.reward import RewardRule
from goalkit.thresholds.diagnostics import diagnose
from goalkit.thresholds.session import suggested_range
from goalkit.thresholds.temporal import temporal_threshold, youden_threshold

gym = pytest.importorskip("gymnasium")


def record(name, episodes, seed):
    env = gym.make(name)
    obs_all, act_all, off = [], [], [0]
    for e in range(episodes):
        o, _ = env.reset(seed=seed + e)
        env.action_space.seed(seed + e)
        obs, acts = [o], []
        while True:
            a = env.action_space.sample()
            o, _, term, trunc, _ = env.step(a)
            obs.append(o)
            acts.append(np.atleast_1d(a))
            if term or trunc:
                break
        obs_all.append(np.array(obs))
        act_all.append(np.array(acts, dtype=np.float64))
        off.append(off[-1] + len(acts))
    env.close()
    return np.concatenate(obs_all).astype(np.float64), np.concatenate(act_all), np.array(off)


@pytest.mark.parametrize("name", ["MountainCar-v0", "Pendulum-v1"])
def test_temporal_threshold_where_the_rule_of_thumb_collapses(name):
    obs, act, off = record(name, 30, 0)
    episodes = EpisodeSet(observations=obs, actions=act.reshape(len(act), -1), offsets=off,
                          episode_ids=np.arange(len(off) - 1))
    rule = RewardRule.from_table({"threshold": 0.05})
    # the old label-free range is empty on these recordings (the report)
    old = suggested_range(diagnose(episodes, IndexGoalMap(list(range(obs.shape[1]))), rule, seed=0), rule)
    assert not old["ok"]
    rec = temporal_threshold(obs, off, rule.distance, seed=0)
    assert rec.threshold is not None and rec.threshold > 0
    # it separates pairs one step apart from pairs ten or more apart: most of the first reached,
    # few of the second
    assert rec.youden_j > 0.7 and rec.tpr > 0.9 and rec.fpr < 0.2
    # and is at least the old low end (half the median step): paths through a goal still reach it
    assert rec.threshold >= old["low"]
    # recomputed from the recording's own order, without the graph: same-episode pairs 1 step apart
    # against pairs 10..40 apart (the graph can only shorten some of these)
    rng = np.random.default_rng(1)
    ep = rng.integers(0, len(off) - 1, 4000)
    t = rng.integers(0, np.diff(off)[ep] - 40)
    first = off[ep] + ep
    near = rule.distance(obs[first + t], obs[first + t + 1])
    far = rule.distance(obs[first + t], obs[first + t + rng.integers(10, 41, len(t))])
    thr, j, _, _ = youden_threshold(near, far)
    assert rec.threshold == pytest.approx(thr, rel=0.5)
    assert j > 0.7


def test_youden_threshold_on_separated_sets():
    thr, j, tpr, fpr = youden_threshold([0.1, 0.2, 0.3], [1.0, 2.0, 3.0])
    assert (thr, j, tpr, fpr) == (0.3, 1.0, 1.0, 0.0)
