"""The on-the-fly sampler: same rules as the build, fresh goals per batch, replayable."""

import numpy as np
import pytest
from scipy import stats

from goalkit.demo import make_demo
from goalkit.pipeline.recipe import load_recipe
from goalkit.pipeline.split import split_codes
from goalkit.write.sampler import GoalSampler


@pytest.fixture(scope="module")
def sampler(tmp_path_factory):
    d = tmp_path_factory.mktemp("demo")
    make_demo(d, episodes=40, seed=2)
    return GoalSampler(load_recipe(d / "gantry-recipe.toml"))


def test_batches_follow_the_rules(sampler):
    b = sampler.batch(4096, index=0)
    rule = sampler.recipe.reward
    d = rule.distance(b["reached_goal"].astype(np.float64), b["goal"].astype(np.float64))
    np.testing.assert_array_equal(b["reward"], rule.reward_from(d))
    fut = b["strategy"] == 2
    assert np.all(b["goal_episode"][fut] == b["source_episode"][fut])
    assert np.all(b["goal_step"][fut] > b["source_step"][fut])
    codes = split_codes(b["source_episode"], sampler.recipe.validation, sampler.recipe.salt)
    assert np.all(codes == 0)
    # phi(s_t+1) is the next observation's head + tray fields
    np.testing.assert_array_equal(b["reached_goal"][:, :3], b["next_observation"][:, :3].astype(b["reached_goal"].dtype))


def test_replayable_and_fresh(sampler):
    a, a2, b = sampler.batch(512, 7), sampler.batch(512, 7), sampler.batch(512, 8)
    for k in a:
        np.testing.assert_array_equal(a[k], a2[k])
    assert not np.array_equal(a["goal"], b["goal"])


def test_strategy_shares_follow_the_weights(sampler):
    # demo weights: original 1, final 1, future 2, geometric 1 -> future share 2/5; exact
    # binomial test (scipy.stats.binomtest) on 20 batches.
    s = np.concatenate([sampler.batch(1000, i)["strategy"] for i in range(20)])
    assert stats.binomtest(int(np.sum(s == 2)), len(s), 0.4).pvalue > 0.01
