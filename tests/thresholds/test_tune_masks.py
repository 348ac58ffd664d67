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
    assert "diagnostics use each state's episode task mask; rewarded fractions each goal row's goal_mask" in text
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


# ---- label-free diagnostics and rewarded fractions under masks ------------------------------
# Property (the masks' contract, docs/reward.md): a dimension no goal's mask keeps never changes
# a number; a full mask gives the numbers of no mask bit for bit (x * 1 == x and 0 + x == x in
# IEEE 754 arithmetic).

import json  # noqa: E402

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from goalkit.goals.goalmap import IndexGoalMap  # noqa: E402
from goalkit.logs.episodes import EpisodeSet  # noqa: E402
from goalkit.masks import MaskSpec  # noqa: E402
from goalkit.reward import RewardRule  # noqa: E402
from goalkit.thresholds.diagnostics import diagnose, rewarded_fraction, state_masks  # noqa: E402
from goalkit.thresholds.temporal import temporal_threshold  # noqa: E402

G = 4


def _episodes(seed, n_eps=12):
    r = np.random.default_rng(seed)
    lengths = r.integers(2, 30, n_eps)
    steps = r.normal(0, 0.05, (int(lengths.sum() + n_eps), G))
    obs = np.concatenate([np.cumsum(steps[a:a + t + 1], axis=0) + r.uniform(0, 1, G)
                          for a, t in zip(np.concatenate([[0], np.cumsum(lengths + 1)[:-1]]), lengths)])
    return EpisodeSet(observations=obs, actions=np.zeros((int(lengths.sum()), 1)),
                      offsets=np.concatenate([[0], np.cumsum(lengths)]), episode_ids=np.arange(n_eps) + 3,
                      task_ids=np.arange(n_eps) % 3)


def _same(a, b):
    np.testing.assert_array_equal(np.asarray(a), np.asarray(b))  # NaN equals NaN here


def _numbers(eps, rule, masks):
    diag = diagnose(eps, IndexGoalMap(tuple(range(G))), rule, sample=150, seed=2, masks=masks)
    goals = np.asarray(eps.observations, dtype=np.float64)
    temporal = temporal_threshold(goals, eps.offsets, rule.distance, seed=2, pairs=400,
                                  mask=state_masks(eps, masks)).as_dict()
    return diag, temporal


def _check_equal(x, y):
    (d1, t1), (d2, t2) = x, y
    _same(d1.step, d2.step)
    _same(d1.horizon.values, d2.horizon.values)
    _same(d1.other.neighbour_rows, d2.other.neighbour_rows)
    _same(d1.other.distance, d2.other.distance)
    _same(d1.other.euclidean, d2.other.euclidean)
    assert json.dumps(d1.summary(), sort_keys=True) == json.dumps(d2.summary(), sort_keys=True)  # NaN-safe
    assert json.dumps(t1, sort_keys=True) == json.dumps(t2, sort_keys=True)


TABLE = {"groups": {"xy": [0, 1], "z": [2]}, "tasks": {"0": ["xy"], "1": [0]}, "others": ["xy"]}


@pytest.mark.parametrize("distance", ["euclidean", "l1", "chebyshev"])
@given(seed=st.integers(0, 2**31), junk=st.integers(0, 2**31))
@settings(max_examples=15, deadline=None)
def test_diagnostics_never_see_a_dimension_no_mask_keeps(distance, seed, junk):
    # every task's mask lies within x-y (dimensions 0, 1): changing z and w (2, 3) changes nothing
    eps = _episodes(seed)
    masks = MaskSpec.from_table(TABLE).resolve(G, task_ids=[0, 1, 2])
    rule = RewardRule(distance, 0.05)
    before = _numbers(eps, rule, masks)
    obs = eps.observations.copy()
    obs[:, 2:] = np.random.default_rng(junk).normal(0, 10, (len(obs), 2))
    after = _numbers(EpisodeSet(observations=obs, actions=eps.actions, offsets=eps.offsets,
                                episode_ids=eps.episode_ids, task_ids=eps.task_ids), rule, masks)
    _check_equal(before, after)
    # ... while without masks the same change moves them (the check can fail)
    plain = _numbers(eps, rule, None)[0]
    moved = _numbers(EpisodeSet(observations=obs, actions=eps.actions, offsets=eps.offsets,
                                episode_ids=eps.episode_ids, task_ids=eps.task_ids), rule, None)[0]
    assert not np.array_equal(plain.step, moved.step)


@given(seed=st.integers(0, 2**31), junk=st.integers(0, 2**31))
@settings(max_examples=40, deadline=None)
def test_rewarded_fraction_never_sees_a_dimension_the_row_mask_leaves_out(seed, junk):
    r = np.random.default_rng(seed)
    m = 200
    achieved, goal = r.normal(0, 0.1, (m, G)), r.normal(0, 0.1, (m, G))
    mask = (r.random((m, G)) < 0.5).astype(np.uint8)
    mask[np.arange(m), r.integers(0, G, m)] = 1  # never an empty mask
    strategy = r.integers(0, 4, m)
    rule = RewardRule("euclidean", 0.1)
    thresholds = np.linspace(0, 0.4, 9)
    before = rewarded_fraction(achieved, goal, strategy, rule, thresholds, mask)
    noise = np.random.default_rng(junk).normal(0, 10, (2, m, G))
    out = mask == 0
    a2, g2 = np.where(out, noise[0], achieved), np.where(out, noise[1], goal)
    after = rewarded_fraction(a2, g2, strategy, rule, thresholds, mask)
    _same(before.fraction, after.fraction)
    _same(before.counts, after.counts)


@pytest.mark.parametrize("distance", ["euclidean", "l1", "chebyshev", "box", "cosine"])
def test_a_full_mask_gives_the_numbers_of_no_mask_bit_for_bit(distance):
    eps = _episodes(5)
    full = MaskSpec.from_table({"others": [0, 1, 2, 3]}).resolve(G, task_ids=[0, 1, 2])
    rule = RewardRule(distance, (0.05,) * G if distance == "box" else 0.05)
    _check_equal(_numbers(eps, rule, full), _numbers(eps, rule, None))
    r = np.random.default_rng(1)
    a, g, s = r.normal(0, 0.1, (300, G)), r.normal(0, 0.1, (300, G)), r.integers(0, 3, 300)
    t = np.linspace(0, 1, 17)
    _same(rewarded_fraction(a, g, s, rule, t, np.ones((300, G), np.uint8)).fraction,
          rewarded_fraction(a, g, s, rule, t).fraction)


def test_tune_without_labels_full_mask_equals_no_mask_and_masked_equals_the_masked_goal(logs):
    d, _ = logs
    plain = goalkit.tune(_recipe(d, "nolab-plain"), n_resamples=0).as_dict()
    full = goalkit.tune(_recipe(d, "nolab-full", mask='\n[mask]\nothers = ["pos", "noise"]\n'),
                        n_resamples=0).as_dict()
    keys = ("diagnostics", "suggested_range", "rewarded_fraction", "warnings")
    for k in keys:
        assert full[k] == plain[k], k
    assert full["masks"] is not None and plain["masks"] is None
    # a mask over pos only gives the numbers of a goal of pos alone (the noise column never
    # counts); future goals here, as the log's task goals have both columns
    def future(name, fields, mask=""):
        p = d / f"{name}.toml"
        p.write_text(RECIPE.format(fields=fields, out=name).replace("original = 1", "future = 1") + mask)
        return goalkit.tune(p, n_resamples=0).as_dict()

    masked = future("nolab-masked", '["pos", "noise"]', MASK)
    pos = future("nolab-pos", '["pos"]')
    plain = future("nolab-both", '["pos", "noise"]')
    for k in ("suggested_range", "rewarded_fraction"):
        assert masked[k] == pos[k], k
    md, pd_ = dict(masked["diagnostics"]), dict(pos["diagnostics"])
    md.pop("rule"), pd_.pop("rule")
    assert md == pd_
    assert masked["diagnostics"] != plain["diagnostics"]
