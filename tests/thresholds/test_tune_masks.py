"""`goalkit tune` with a recipe [mask] table: labelled pairs are scored on their episode's task mask.

Logs made in the test: a 1-D position moves towards a task goal and the log's success flag is
``|position - goal| <= 0.05``; a second goal field carries large noise (standard deviation 1)
that the task does not constrain. The expected thresholds are computed here with plain numpy
from the position column alone: with labels that the position separates exactly, every
max-F1 threshold lies between the largest reached distance and the smallest not-reached one,
and the midpoint placement takes the middle of that gap (docs/tuning.md, "What is computed").
"""

import h5py
import numpy as np
import pytest

import goalkit

EPISODES, STEPS, TOL = 30, 40, 0.05

LAYOUT = """\
version = 1
shape = "grouped"
episode_groups = "runs/*"

[keys]
action = "action"
success = "success"
task = "task"
task_goal = "task_goal"

[fields]
pos = "pos"
noise = "noise"
"""

RECIPE = """\
version = 1
seed = 5

[logs]
path = "logs.h5"
layout = "layout.toml"

[goal]
fields = {fields}
dtype = "float64"

[relabel]
goals_per_transition = 1
[relabel.weights]
original = 1

[reward]
distance = "euclidean"
threshold = 0.2

[split]
validation = 0.0

[output]
path = "{out}.h5"
"""


@pytest.fixture(scope="module")
def logs(tmp_path_factory):
    d = tmp_path_factory.mktemp("tune-masks")
    rng = np.random.default_rng(7)
    ach, goal, succ, ep_ids = [], [], [], []
    with h5py.File(d / "logs.h5", "w") as f:
        for e in range(EPISODES):
            target = rng.uniform(0.2, 0.8)
            pos = np.empty(STEPS + 1)
            pos[0] = rng.uniform(0.0, 1.0)
            for t in range(STEPS):  # test data: a short loop over steps
                pos[t + 1] = pos[t] + 0.15 * (target - pos[t]) + rng.normal(0.0, 0.03)
            noise = rng.normal(0.0, 1.0, STEPS + 1)
            success = np.abs(pos[1:] - target) <= TOL
            g = f.create_group(f"runs/run_{e:03d}")
            g.attrs["task"] = np.int64(e % 2)
            g["pos"] = pos[:, None]
            g["noise"] = noise[:, None]
            g["action"] = np.zeros((STEPS, 1), np.float32)
            g["success"] = success.astype(np.uint8)
            g["task_goal"] = np.tile([target, 0.0], (STEPS, 1))
            ach.append(np.stack([pos[1:], noise[1:]], axis=1))
            goal.append(np.tile([target, 0.0], (STEPS, 1)))
            succ.append(success)
            ep_ids.append(np.full(STEPS, e))
    (d / "layout.toml").write_text(LAYOUT)
    raw = {"achieved": np.concatenate(ach), "goal": np.concatenate(goal),
           "success": np.concatenate(succ), "episode": np.concatenate(ep_ids)}
    return d, raw


def _recipe(d, name, mask=""):
    p = d / f"{name}.toml"
    p.write_text(RECIPE.format(fields='["pos", "noise"]', out=name) + mask)
    return p


MASK = '\n[mask]\ntasks = { "0" = ["pos"], "1" = ["pos"] }\n'


def _gap_midpoint(d, y):
    """Max-F1 threshold, midpoint placement, for labels that ``d`` separates exactly."""
    assert d[y].max() < d[~y].min()  # the position alone separates the labels
    return 0.5 * (d[y].max() + d[~y].min())


def test_masked_tuning_equals_tuning_on_the_masked_column_alone(logs):
    d, raw = logs
    y = raw["success"]
    assert 0.1 < y.mean() < 0.9
    pos_only = np.abs(raw["achieved"][:, 0] - raw["goal"][:, 0])  # numpy, the masked column only
    expected = _gap_midpoint(pos_only, y)
    full = np.sqrt(((raw["achieved"] - raw["goal"]) ** 2).sum(axis=1))  # every column
    assert full[y].max() > full[~y].min()  # the noise column mixes the labels up

    masked = goalkit.tune(_recipe(d, "masked", mask=MASK), from_success=True, n_resamples=0)
    plain = goalkit.tune(_recipe(d, "plain"), from_success=True, n_resamples=0)

    assert masked.recipe_threshold() == pytest.approx(expected, rel=1e-12, abs=0)
    assert masked.winner.tuner.roc_auc_ == 1.0 and masked.winner.tuner.choice_.f1 == 1.0
    np.testing.assert_array_equal(masked.winner.tuner.distances_, pos_only)
    np.testing.assert_array_equal(plain.winner.tuner.distances_, full)
    assert plain.recipe_threshold() != pytest.approx(expected, rel=0.05)
    assert plain.winner.tuner.roc_auc_ < 0.95
    assert masked.as_dict()["candidates"][0]["pairs"]["masked"] is True
    assert plain.as_dict()["candidates"][0]["pairs"]["masked"] is False

    text = masked.render()
    assert "labelled pairs are scored on their episode's task mask (no random masks)" in text
    assert "every goal dimension" not in text
    assert "masks:" not in plain.render()


def test_mask_per_task_from_the_logs(logs):
    """Task 1 constrains the noise column only: its pairs are scored on noise, task 0's on pos."""
    d, raw = logs
    mask = '\n[mask]\ntasks = { "0" = ["pos"], "1" = ["noise"] }\n'
    res = goalkit.tune(_recipe(d, "pertask", mask=mask), from_success=True, n_resamples=0)
    task = raw["episode"] % 2
    diff = np.abs(raw["achieved"] - raw["goal"])
    expected = np.where(task == 0, diff[:, 0], diff[:, 1])
    np.testing.assert_array_equal(res.winner.tuner.distances_, expected)


def test_labelled_pairs_file_takes_the_task_through_its_episode_column(logs, tmp_path):
    d, raw = logs
    y = raw["success"]
    expected = _gap_midpoint(np.abs(raw["achieved"][:, 0] - raw["goal"][:, 0]), y)
    with_ep = tmp_path / "pairs.npz"
    np.savez(with_ep, achieved=raw["achieved"], goal=raw["goal"], reached=y, episode=raw["episode"])
    res = goalkit.tune(_recipe(d, "file", mask=MASK), labels=with_ep, n_resamples=0)
    assert res.recipe_threshold() == pytest.approx(expected, rel=1e-12, abs=0)
    assert not any("labelled pairs are scored with" in n for n in res.notes)

    # without an episode column the pairs get the table's "others" (every dimension here)
    no_ep = tmp_path / "pairs-no-episode.npz"
    np.savez(no_ep, achieved=raw["achieved"], goal=raw["goal"], reached=y)
    res = goalkit.tune(_recipe(d, "file2", mask=MASK), labels=no_ep, n_resamples=0)
    full = np.sqrt(((raw["achieved"] - raw["goal"]) ** 2).sum(axis=1))
    np.testing.assert_array_equal(res.winner.tuner.distances_, full)
    assert any(f"{y.size} of {y.size} labelled pairs are scored with the [mask] table's mask of other "
               f"tasks: the pairs carry no episode column" in n for n in res.notes)
