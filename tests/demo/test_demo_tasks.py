"""Tasks and controllers: success flags re-derived from stored states; success rates by controller."""

from __future__ import annotations

import h5py
import numpy as np
import pytest
from scipy.spatial.distance import euclidean  # reference distance (SciPy)

from goalkit.demo import make_demo
from goalkit.demo.bench import GantryParams
from goalkit.demo.simulate import simulate
from goalkit.demo.tasks import WATER_HOLD, WATER_RADIUS, task_goals, task_name


@pytest.fixture(scope="module")
def logs(tmp_path_factory):
    return make_demo(tmp_path_factory.mktemp("tasks"), episodes=80, seed=3)["logs"]


def test_success_flags_match_the_task_definitions(logs):
    """Recompute every flag from the stored states with a plain loop and SciPy's distance."""
    seen = {"water": 0, "slide": 0}
    with h5py.File(logs) as f:
        K = int(f.attrs["trays"])
        lanes = f.attrs["tray_lanes"]
        strip = f.attrs["light_strip"]
        for name in sorted(f["bench"]):
            g = f["bench"][name]
            task = int(g.attrs["task"])
            head, trays = g["head"][()], g["trays"][()]
            success = g["success"][()].astype(bool)
            goal = g["task_goal"][0]
            T = len(success)
            np.testing.assert_array_equal(g["reward"][()], success.astype(np.float32))
            assert (g["task_goal"][()] == goal).all()           # one goal per episode
            k = task % K
            flags = []
            if task < K:
                # goal: over tray k's starting centre at watering height, trays where they started
                assert goal.tolist() == [trays[0, k], lanes[k], 0.10, *trays[0]]
                run = 0
                for t in range(T):
                    close = euclidean(np.r_[head[t + 1], trays[t + 1]], goal) <= WATER_RADIUS
                    run = run + 1 if close else 0
                    flags.append(run >= WATER_HOLD)
            else:
                assert goal[3 + k] == strip.mean()
                for t in range(T):
                    flags.append(strip[0] <= trays[t + 1, k] <= strip[1])
            flags = np.array(flags)
            np.testing.assert_array_equal(success, flags, err_msg=name)
            # an episode ends on its first success, or after 80 steps without one
            if success.any():
                assert np.flatnonzero(success).tolist() == [T - 1]
                seen["water" if task < K else "slide"] += 1
            else:
                assert T == 80
    assert seen["water"] > 5 and seen["slide"] > 5


def test_task_goals_and_names():
    p = GantryParams(trays=2)
    trays0 = np.array([[0.3, 0.5], [0.3, 0.5]])
    g = task_goals(np.array([1, 2]), trays0, p)
    np.testing.assert_allclose(g[0], [0.5, p.lanes[1], p.water_height, 0.3, 0.5])
    finish = p.strip_centre - p.tray_half_length - p.head_radius
    np.testing.assert_allclose(g[1], [finish, p.lanes[0], p.push_height, p.strip_centre, 0.5])
    assert task_name(1, p) == "water tray 1"
    assert task_name(2, p) == "slide tray 0 into the light strip"


def test_success_rates_order_scripted_noisy_random():
    rates = {}
    for kind in ("scripted", "noisy", "random"):
        r = simulate(120, seed=11, controller=kind)
        rates[kind] = r.success.any(axis=1).mean()
    assert rates["scripted"] > rates["noisy"] > rates["random"]
    assert rates["scripted"] >= 0.95          # scripted is reliable
    assert 0.3 < rates["noisy"] < 0.95        # noisy sometimes fails
    assert rates["random"] < 0.1


def test_controllers_are_addressed_by_episode_id():
    # episodes 5..9 drawn alone equal episodes 5..9 of a longer run (no sequential generator)
    whole = simulate(10, seed=4)
    part = simulate(5, seed=4, first_episode=5)
    np.testing.assert_array_equal(part.actions, whole.actions[5:])
    np.testing.assert_array_equal(part.tasks, whole.tasks[5:])
    np.testing.assert_array_equal(part.controllers, whole.controllers[5:])


def test_controller_shares_roughly_as_designed():
    r = simulate(600, seed=2, max_steps=1)
    share = np.bincount(r.controllers, minlength=3) / 600
    # designed shares 0.4 / 0.4 / 0.2; 4 binomial standard errors at n = 600 is about 0.08
    np.testing.assert_allclose(share, [0.4, 0.4, 0.2], atol=0.08)
    assert np.bincount(r.tasks, minlength=6).min() > 60   # six tasks, each about 100 times


def test_recipe_reward_rule_reaches_every_watering_success(logs):
    """The recipe's own reward rule (loaded by goalkit.pipeline) scores each watering success
    step as reached against its task goal; the steps before the hold completes may also be."""
    from pathlib import Path

    from goalkit.pipeline.recipe import load_recipe

    recipe = load_recipe(Path(logs).with_name("gantry-recipe.toml"))
    achieved, goals, flags = [], [], []
    with h5py.File(logs) as f:
        K = int(f.attrs["trays"])
        for g in f["bench"].values():
            if int(g.attrs["task"]) >= K:
                continue
            achieved.append(np.concatenate([g["head"][1:], g["trays"][1:]], axis=1))
            goals.append(g["task_goal"][()])
            flags.append(g["success"][()].astype(bool))
    achieved, goals, flags = map(np.concatenate, (achieved, goals, flags))
    reached = recipe.reward.reached(achieved, goals)
    assert flags.sum() > 5
    assert reached[flags].all()
    assert reached.sum() > flags.sum()        # reached also before the 3-step hold completes
    np.testing.assert_array_equal(reached, np.linalg.norm(achieved - goals, axis=1) <= WATER_RADIUS)
