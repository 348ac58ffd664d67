"""Outside check: a MuJoCo arm from Gymnasium (Pusher-v5) recorded as flat obs/next_obs rows with
unfamiliar key names; goals are columns of the observation, built and verified.

Sources:
* Pusher-v5's observation (Gymnasium documentation, "Pusher", Observation Space; Farama
  Foundation; quoted from memory): 23 values, 0-6 the arm's joint angles, 7-13 their angular
  velocities, 14-16 the fingertip ("tips_arm") x, y, z, 17-19 the object's x, y, z, 20-22 the
  goal's x, y, z. Not trusted from memory: the test checks these columns against MuJoCo's own
  body positions (``env.unwrapped.get_body_com``) at every recorded step.
* The time limit, 100 steps, is read from the registry (``gymnasium.spec("Pusher-v5")``).
"""

from __future__ import annotations

import gymnasium
import h5py
import numpy as np
import pytest

from goalkit import build, load_recipe, verify
from goalkit.logs.layout import layout_to_toml, parse_layout

pytest.importorskip("mujoco")

EPISODES = 4
ENV = "Pusher-v5"


@pytest.fixture(scope="module")
def arm(tmp_path_factory):
    d = tmp_path_factory.mktemp("arm")
    env = gymnasium.make(ENV)
    limit = gymnasium.spec(ENV).max_episode_steps
    rows = {k: [] for k in ("q", "q_after", "ctrl", "halt", "cut", "take")}
    tips, objects = [], []
    for k in range(EPISODES):
        obs, _ = env.reset(seed=100 + k)
        env.action_space.seed(100 + k)
        body = env.unwrapped
        assert np.allclose(obs[14:17], body.get_body_com("tips_arm"))
        while True:
            a = env.action_space.sample()
            nxt, _, terminated, truncated, _ = env.step(a)
            # the documented columns are MuJoCo's own body positions (outside the observation)
            tips.append(body.get_body_com("tips_arm").copy())
            objects.append(body.get_body_com("object").copy())
            for key, v in (("q", obs), ("q_after", nxt), ("ctrl", a), ("halt", terminated), ("cut", truncated),
                           ("take", k + 10)):
                rows[key].append(v)
            obs = nxt
            if terminated or truncated:
                break
    env.close()
    with h5py.File(d / "arm.h5", "w") as f:
        for key, v in rows.items():
            f.create_dataset(f"rec/{key}", data=np.asarray(v), chunks=True)
    return d, limit, np.asarray(tips), np.asarray(objects)


LAYOUT = {
    "shape": "flat",
    "keys": {"observation": {"key": "rec/q", "columns": "0:20"}, "next_observation": "rec/q_after",
             "action": "rec/ctrl", "termination": "rec/halt", "time_limit": "rec/cut",
             "task_goal": {"key": "rec/q", "columns": [20, 21, 22]}},
    "boundaries": {"episode_id": "rec/take", "done": ["rec/halt", "rec/cut"]},
}


def _recipe(d, goal_line, weights, name):
    (d / f"{name}-layout.toml").write_text(layout_to_toml(parse_layout(LAYOUT)))
    (d / f"{name}.toml").write_text(f"""
version = 1
seed = 11
[logs]
path = "arm.h5"
layout = "{name}-layout.toml"
[goal]
{goal_line}
[relabel]
goals_per_transition = 2
[relabel.weights]
{weights}
[reward]
threshold = 0.05
end_on_reach = true
[split]
validation = 0.25
[output]
path = "{name}.h5"
""")
    return load_recipe(d / f"{name}.toml")


def test_fingertip_goals_from_observation_columns(arm):
    d, limit, tips, _ = arm
    assert limit == 100
    recipe = _recipe(d, "indices = [14, 15, 16]", "future = 3\nfinal = 1", "tip")
    result = build(recipe)
    with h5py.File(result.path, "r") as f:
        for split in ("train", "validation"):
            g = f[split]
            ep, t = g["source_episode"][:], g["source_step"][:]
            # phi(s_t+1) is MuJoCo's fingertip position after step t (float32 goals)
            want = tips[ep * limit + t].astype(np.float32)
            np.testing.assert_allclose(g["reached_goal"][:], want, rtol=0, atol=1e-6)
            assert g["observation"].shape[1] == 20
            last = t == limit - 1
            np.testing.assert_array_equal(g["time_limit"][:], last.astype(np.uint8))
            assert not g["termination"][:].any()
    report = verify(result.path)
    assert report.ok, report.failures


def test_task_goal_from_columns_and_original(arm):
    d, limit, _, objects = arm
    recipe = _recipe(d, "indices = [17, 18, 19]", "original = 1\nfuture = 1", "object")
    result = build(recipe)
    with h5py.File(d / "arm.h5", "r") as logs:
        goal_cols = logs["rec/q"][:, 20:23]
    with h5py.File(result.path, "r") as f:
        g = f["train"]
        orig = g["strategy"][:] == 0
        assert orig.any()
        ep, t = g["source_episode"][:][orig], g["source_step"][:][orig]
        np.testing.assert_array_equal(g["goal"][:][orig], goal_cols[ep * limit + t].astype(np.float32))
        np.testing.assert_allclose(g["reached_goal"][:], objects[g["source_episode"][:] * limit
                                                                 + g["source_step"][:]].astype(np.float32),
                                   atol=1e-6)
    report = verify(result.path)
    assert report.ok, report.failures
