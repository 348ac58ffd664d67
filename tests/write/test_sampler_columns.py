"""Sampler batches carry the transition's facts a built set stores: the log's end flags
(termination, time_limit), the log source, the task reward, and graph distances with [graph].

Reference: the built set of the same recipe (rows of the same transition and goal state must
carry the same values) and the recorded logs themselves (the flags as written here). The logs
are invented: the gantry's nozzle head stepping between cells of a 6 x 6 seedling bench, one
cell per step, an episode ending when the head reaches the watering cell (termination) or
after 12 steps (time limit).
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from goalkit import HeadSampler, RewardRule, build, load_recipe
from goalkit.heads import GoalHead
from goalkit.write.sampler import GoalSampler

LAYOUT = """version = 1
shape = "flat"
[keys]
observation = "obs"
action = "act"
termination = "term"
time_limit = "trunc"
reward = "rew"
[boundaries]
episode_id = "ids"
"""
RECIPE = """version = 1
seed = 4
[[sources]]
name = "scripted"
path = "scripted.h5"
layout = "layout.toml"
[[sources]]
name = "random"
path = "random.h5"
layout = "layout.toml"
[goal]
indices = [0, 1]
[relabel]
goals_per_transition = 3
[relabel.weights]
future = 2
final = 1
episode = 1
[reward]
threshold = 0.05
[split]
validation = 0.25
[output]
path = "cells.h5"
[graph]
join_radius = 0.05
horizon = 30
goal_share = 1.0
index = "exact"
[heads.value]
weights = { current = 0.2, geometric = 0.5, random = 0.3 }
[heads.policy]
weights = { future = 1 }
"""
WATER = (4, 4)
RULE = RewardRule("euclidean", 0.05)


def walk(rng, scripted):
    """One episode on the bench grid: cells (x, y) in 0..5, unit steps; ends at WATER or after 12."""
    cell = rng.integers(0, 6, 2)
    states, actions, term = [cell.copy()], [], []
    for _ in range(12):
        if scripted:
            d = np.sign(np.array(WATER) - cell)
            move = np.array([d[0], 0]) if d[0] and (not d[1] or rng.random() < 0.5) else np.array([0, d[1]])
        else:
            move = [np.array(m) for m in ((1, 0), (-1, 0), (0, 1), (0, -1))][rng.integers(4)]
        cell = np.clip(cell + move, 0, 5)
        states.append(cell.copy())
        actions.append(move)
        term.append(bool(np.array_equal(cell, WATER)))
        if term[-1]:
            break
    trunc = [False] * (len(term) - 1) + [not term[-1]]
    return np.array(states) / 10.0, np.array(actions, np.float32), np.array(term), np.array(trunc)


def write(path, eps, first):
    obs = np.concatenate([e[0] for e in eps])
    with h5py.File(path, "w") as f:
        f["obs"] = obs
        f["act"] = np.concatenate([e[1] for e in eps])
        f["term"] = np.concatenate([e[2] for e in eps])
        f["trunc"] = np.concatenate([e[3] for e in eps])
        f["rew"] = -1.0 + np.concatenate([e[2] for e in eps]).astype(np.float32)
        f["ids"] = np.repeat(np.arange(len(eps)) + first, [len(e[1]) for e in eps])


@pytest.fixture(scope="module")
def cells(tmp_path_factory):
    d = tmp_path_factory.mktemp("cells")
    rng = np.random.default_rng(8)
    write(d / "scripted.h5", [walk(rng, True) for _ in range(14)], 0)
    write(d / "random.h5", [walk(rng, False) for _ in range(14)], 100)
    (d / "layout.toml").write_text(LAYOUT)
    (d / "recipe.toml").write_text(RECIPE)
    recipe = load_recipe(d / "recipe.toml")
    result = build(recipe)
    with h5py.File(result.path, "r") as f:
        stored = {k: f["train"][k][:] for k in f["train"]}
    return recipe, stored


def facts_by_transition(stored):
    """(source_episode, source_step) -> (termination, time_limit, source, task_reward) of the built set."""
    out = {}
    for row in zip(stored["source_episode"].tolist(), stored["source_step"].tolist(), stored["termination"].tolist(),
                   stored["time_limit"].tolist(), stored["source"].tolist(), stored["task_reward"].tolist()):
        out[row[:2]] = row[2:]
    return out


def graph_by_pair(stored):
    """(source_episode, source_step, goal_episode, goal_step) -> graph_steps of the built set."""
    keys = zip(stored["source_episode"].tolist(), stored["source_step"].tolist(),
               stored["goal_episode"].tolist(), stored["goal_step"].tolist())
    return dict(zip(keys, stored["graph_steps"].tolist()))


def test_goal_sampler_carries_the_columns_of_a_built_set(cells):
    recipe, stored = cells
    b = GoalSampler(recipe).batch(2000, 0)
    for name in ("termination", "time_limit", "source", "task_reward", "graph_steps"):
        assert name in b and b[name].dtype == stored[name].dtype and b[name].shape == (2000,), name
    facts = facts_by_transition(stored)
    keys = list(zip(b["source_episode"].tolist(), b["source_step"].tolist()))
    # every training transition appears in the built set (3 goals each), so each row has a reference
    want = np.array([facts[k] for k in keys])
    np.testing.assert_array_equal(b["termination"], want[:, 0])
    np.testing.assert_array_equal(b["time_limit"], want[:, 1])
    np.testing.assert_array_equal(b["source"], want[:, 2])
    np.testing.assert_array_equal(b["task_reward"], want[:, 3].astype(np.float32))
    assert b["termination"].any() and b["time_limit"].any() and len(np.unique(b["source"])) == 2
    # against the logs as written: a flag only on an episode's last step, the task reward -1 or 0
    last = np.array([facts.get((e, t + 1)) is None for e, t in keys])
    assert not b["termination"][~last].any() and not b["time_limit"][~last].any()
    assert np.all(b["termination"][last] + b["time_limit"][last] == 1)
    np.testing.assert_array_equal(b["task_reward"], b["termination"].astype(np.float32) - 1)
    # graph distances: wherever the built set has the same (transition, goal state), the same value
    pairs = graph_by_pair(stored)
    keys4 = list(zip(b["source_episode"].tolist(), b["source_step"].tolist(), b["goal_episode"].tolist(),
                     b["goal_step"].tolist()))
    common = [i for i, k in enumerate(keys4) if k in pairs]
    assert len(common) > 200
    np.testing.assert_array_equal(b["graph_steps"][common], [pairs[keys4[i]] for i in common])
    # a same-episode goal j >= t + 1 is at most j - t - 1 logged steps from s_t+1
    ahead = (b["goal_episode"] == b["source_episode"]) & (b["steps_to_goal"] >= 1)
    assert np.all((b["graph_steps"][ahead] >= 0) & (b["graph_steps"][ahead] <= b["steps_to_goal"][ahead] - 1))


def test_head_sampler_carries_the_columns_of_a_built_set(cells):
    recipe, stored = cells
    s = HeadSampler(recipe)
    b = s.batch(1500, 3)
    facts = facts_by_transition(stored)
    want = np.array([facts[k] for k in zip(b["source_episode"].tolist(), b["source_step"].tolist())])
    for j, name in enumerate(("termination", "time_limit", "source", "task_reward")):
        assert b[name].dtype == stored[name].dtype
        np.testing.assert_array_equal(b[name], want[:, j].astype(stored[name].dtype))
    pairs = graph_by_pair(stored)
    for head in ("value", "policy"):
        h = b[head]
        assert h["graph_steps"].dtype == np.int64 and h["source"].dtype == np.uint8  # the goal source code
        keys = list(zip(b["source_episode"].tolist(), b["source_step"].tolist(), h["goal_episode"].tolist(),
                        h["goal_step"].tolist()))
        common = [i for i, k in enumerate(keys) if k in pairs]
        assert len(common) > 50, head
        np.testing.assert_array_equal(h["graph_steps"][common], [pairs[keys[i]] for i in common])
        ahead = (h["steps_to_goal"] >= 1)
        assert np.all(h["graph_steps"][ahead] <= h["steps_to_goal"][ahead] - 1)
    # replayable: the same batch index gives the same columns
    again = s.batch(1500, 3)
    for name in ("termination", "time_limit", "source"):
        np.testing.assert_array_equal(again[name], b[name])
    np.testing.assert_array_equal(again["value"]["graph_steps"], b["value"]["graph_steps"])


def test_from_arrays_takes_the_flags_and_sources():
    rng = np.random.default_rng(1)
    eps = [walk(rng, k % 2 == 0) for k in range(6)]
    goals = np.concatenate([e[0] for e in eps])
    offsets = np.concatenate([[0], np.cumsum([len(e[1]) for e in eps])])
    term = np.concatenate([e[2] for e in eps])
    trunc = np.concatenate([e[3] for e in eps])
    s = HeadSampler.from_arrays(goals, offsets, RULE, [GoalHead("g", {"future": 1})], seed=2,
                                episode_ids=np.arange(6) + 10, terminations=term, time_limits=trunc,
                                sources=np.arange(6) % 2)
    b = s.batch(400, 0)
    ep = b["source_episode"] - 10
    i = offsets[ep] + b["source_step"]
    np.testing.assert_array_equal(b["termination"], term[i].astype(np.uint8))
    np.testing.assert_array_equal(b["time_limit"], trunc[i].astype(np.uint8))
    np.testing.assert_array_equal(b["source"], (ep % 2).astype(np.uint16))
    assert "graph_steps" not in b["g"] and "task_reward" not in b
    with pytest.raises(ValueError, match="termination: expected one value per transition"):
        HeadSampler.from_arrays(goals, offsets, RULE, [GoalHead("g")], terminations=term[:-1])


def test_sampler_adapters_shard_batch_indices_and_carry_the_columns(cells):
    import torch
    from torch.utils.data import DataLoader

    import goalkit

    recipe, _ = cells
    sampler = HeadSampler(recipe)
    # two processes of a distributed job: disjoint batch indices, together 0 .. 9 once each
    parts = [list(goalkit.SampledBatches(sampler, 64, stop=10, rank=r, world_size=2, index=True)) for r in (0, 1)]
    got = sorted(int(b["batch_index"]) for p in parts for b in p)
    assert got == list(range(10)) and len(parts[0]) == len(parts[1]) == 5
    for b in parts[1]:
        direct = sampler.batch(64, int(b["batch_index"]))
        assert b["value"]["goal"].dtype == np.float32 and b["source"].dtype == np.int64  # pinned
        np.testing.assert_array_equal(b["value"]["goal"], direct["value"]["goal"].astype(np.float32))
        np.testing.assert_array_equal(b["time_limit"], direct["time_limit"])
        np.testing.assert_array_equal(b["policy"]["graph_steps"], direct["policy"]["graph_steps"])
    # PyTorch, two data-loader workers: every batch index once, the same batches as drawn directly
    ds = goalkit.TorchSampledBatches(sampler, 32, start=3, stop=11, index=True, rank=0, world_size=1)
    assert isinstance(ds, torch.utils.data.IterableDataset)
    batches = list(DataLoader(ds, batch_size=None, num_workers=2))
    assert sorted(int(b["batch_index"]) for b in batches) == list(range(3, 11))
    for b in batches:
        direct = sampler.batch(32, int(b["batch_index"]))
        np.testing.assert_array_equal(b["termination"].numpy(), direct["termination"])
        np.testing.assert_array_equal(b["value"]["reward"].numpy(), direct["value"]["reward"].astype(np.float32))
        assert b["observation"].dtype == torch.float32 and b["value"]["graph_steps"].dtype == torch.int64
    # a GoalSampler too (flat columns)
    flat = next(iter(goalkit.SampledBatches(GoalSampler(recipe), 16, stop=1)))
    assert flat["goal"].dtype == np.float32 and {"termination", "time_limit", "graph_steps"} <= set(flat)
    with pytest.raises(goalkit.DatasetError):
        goalkit.SampledBatches(object(), 16)
