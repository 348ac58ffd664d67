"""Outside check: real logs recorded from Gymnasium's CartPole-v1, stored in every shape.

The environment, not goalkit, says where episodes end: an episode ends when ``env.step``
returns ``terminated`` or ``truncated``. Whatever shape and observation convention the log is
stored in, goalkit must read back exactly those boundaries, lengths and states.

Sources for the constants:
* Time limit 500 steps: Gymnasium's CartPole-v1 documentation (Farama Foundation, Gymnasium
  docs, "Cart Pole", Episode End: truncation when the episode length is greater than 500), applied
  through the TimeLimit wrapper from the registered EnvSpec's ``max_episode_steps``; the value
  used below is read from the registry (``gymnasium.spec``), and asserted to be 500.
* Termination bounds |x| > 2.4 and |theta| > 12 degrees (0.2095 rad): the same documentation page
  (Episode End); quoted from memory of that page, and only used as a sanity check of the final
  state goalkit reads back.
"""

from __future__ import annotations

import gymnasium
import h5py
import numpy as np
import pytest

from goalkit.logs import iter_chunks, open_logs, propose_layout

SEEDS = (0, 1, 2)
RANDOM_EPISODES = 4          # per seed: random actions, end by termination


def record():
    """Episodes from CartPole-v1: random actions (terminate) and a balancing rule (truncate)."""
    env = gymnasium.make("CartPole-v1")
    episodes = []
    for seed in SEEDS:
        env.action_space.seed(seed)
        for k in range(RANDOM_EPISODES + 1):
            obs, _ = env.reset(seed=1000 * seed + k)
            states, actions, rewards = [obs], [], []
            balance = k == RANDOM_EPISODES
            while True:
                if balance:   # a simple hand-made rule that keeps the pole up until the time limit
                    x, xd, th, thd = obs
                    a = int(th + 0.3 * thd + 0.01 * x + 0.1 * xd > 0)
                else:
                    a = int(env.action_space.sample())
                obs, r, terminated, truncated, _ = env.step(a)
                states.append(obs)
                actions.append(a)
                rewards.append(r)
                if terminated or truncated:
                    break
            episodes.append({"obs": np.array(states, dtype=np.float32), "act": np.array(actions),
                             "rew": np.array(rewards, dtype=np.float32),
                             "terminated": bool(terminated), "truncated": bool(truncated)})
    env.close()
    return episodes


@pytest.fixture(scope="module")
def episodes():
    return record()


def test_environment_facts(episodes):
    limit = gymnasium.spec("CartPole-v1").max_episode_steps   # from the registry's EnvSpec
    assert limit == 500
    lengths = [len(e["act"]) for e in episodes]
    assert sum(e["truncated"] for e in episodes) == len(SEEDS)
    for e, n in zip(episodes, lengths):
        assert e["terminated"] != e["truncated"]
        if e["truncated"]:
            assert n == limit
        else:
            assert n < limit


def layouts(tmp_path, eps):
    """Write the episodes in every shape/convention; yield (name, path, layout, convention)."""
    lengths = np.array([len(e["act"]) for e in eps])
    E = len(eps)
    obs = [e["obs"] for e in eps]
    act = [e["act"] for e in eps]
    rew = [e["rew"] for e in eps]
    keys = {"observation": "obs", "action": "act", "reward": "rew"}

    with h5py.File(tmp_path / "grouped.h5", "w") as f:
        for i in range(E):
            g = f.create_group(f"episodes/run{i}")
            g["obs"], g["act"], g["rew"] = obs[i], act[i], rew[i]
    yield "grouped T+1", tmp_path / "grouped.h5", {"shape": "grouped", "episode_groups": "episodes/*",
                                                   "keys": keys}, "T+1"

    with h5py.File(tmp_path / "grouped_pairs.h5", "w") as f:
        for i in range(E):
            g = f.create_group(f"run{i}")
            g["obs"], g["next_obs"], g["act"] = obs[i][:-1], obs[i][1:], act[i]
    yield "grouped pairs", tmp_path / "grouped_pairs.h5", {
        "shape": "grouped", "episode_groups": "*",
        "keys": {"observation": "obs", "next_observation": "next_obs", "action": "act"}}, "pairs"

    # flat logs: per-step arrays; T+1 observations; the environment's end flags as done
    done = np.concatenate([np.eye(1, n, n - 1, dtype=bool)[0] for n in lengths])
    ids = np.repeat(np.arange(E) * 3 + 5, lengths)
    offsets = np.concatenate([[0], np.cumsum(lengths)])
    flat = {"obs": np.concatenate(obs), "act": np.concatenate(act), "rew": np.concatenate(rew),
            "done": done, "ids": ids, "offsets": offsets}
    with h5py.File(tmp_path / "flat.h5", "w") as f:
        for k, v in flat.items():
            f.create_dataset(k, data=v, chunks=True)
    for kind, key in [("episode_id", "ids"), ("done", "done"), ("offsets", "offsets")]:
        yield f"flat HDF5 {kind}", tmp_path / "flat.h5", {"shape": "flat", "keys": keys,
                                                          "boundaries": {kind: key}}, "T+1"
    pairs = {"obs": np.concatenate([o[:-1] for o in obs]), "next_obs": np.concatenate([o[1:] for o in obs]),
             "act": np.concatenate(act), "done": done}
    np.savez(tmp_path / "flat_pairs.npz", **pairs)
    yield "flat npz pairs", tmp_path / "flat_pairs.npz", {
        "shape": "flat", "keys": {"observation": "obs", "next_observation": "next_obs", "action": "act"},
        "boundaries": {"done": "done"}}, "pairs"
    np.savez_compressed(tmp_path / "flat_t.npz", obs=pairs["obs"], act=pairs["act"], ids=ids)
    yield "flat npz T", tmp_path / "flat_t.npz", {"shape": "flat", "keys": {"observation": "obs", "action": "act"},
                                                  "boundaries": {"episode_id": "ids"}}, "T"
    (tmp_path / "per_file").mkdir()
    for i in range(E):
        np.savez(tmp_path / "per_file" / f"episode_{i}.npz", obs=obs[i], act=act[i], rew=rew[i])
    yield "per-file T+1", tmp_path / "per_file", {"shape": "per-file", "keys": keys}, "T+1"


def test_goalkit_reads_the_environment_boundaries(tmp_path, episodes):
    lengths = np.array([len(e["act"]) for e in episodes])
    seen = set()
    for name, path, layout, convention in layouts(tmp_path, episodes):
        src = open_logs(path, layout)
        assert src.convention == convention, name
        if convention == "T":
            # only T observations stored: the last action of each episode has no following state
            np.testing.assert_array_equal(src.lengths, lengths - 1, err_msg=name)
            assert any("dropped" in n for n in src.notes)
            expect_obs = [e["obs"][:-1] for e in episodes]
        else:
            np.testing.assert_array_equal(src.lengths, lengths, err_msg=name)
            expect_obs = [e["obs"] for e in episodes]
        chunks = list(iter_chunks(src, max_transitions=600))
        assert len(chunks) > 1
        es_obs = np.concatenate([c.observations for c in chunks])
        np.testing.assert_array_equal(es_obs, np.concatenate(expect_obs), err_msg=name)
        acts = np.concatenate([c.actions[:, 0] for c in chunks])
        expect_act = np.concatenate([e["act"][: len(o) - 1] for e, o in zip(episodes, expect_obs)])
        np.testing.assert_array_equal(acts, expect_act, err_msg=name)
        if convention != "T":
            # the final state goalkit reads ends a terminated episode by the documented bounds
            for c in chunks:
                last = c.observations[c.state_offsets()[1:] - 1]
                for e_id, s in zip(c.episode_ids.tolist(), last):
                    if episodes[e_id]["terminated"]:
                        assert abs(s[0]) > 2.4 or abs(s[2]) > 0.2095, name
        seen.add(name)
    assert len(seen) == 8


def test_proposed_layouts_read_the_same_boundaries(tmp_path, episodes):
    lengths = np.array([len(e["act"]) for e in episodes])
    for name, path, layout, convention in layouts(tmp_path, episodes):
        if name.startswith("flat HDF5") and "offsets" not in name:
            continue          # one flat HDF5 proposal suffices (offsets are preferred)
        proposed = propose_layout(path)
        src = open_logs(path, proposed)
        want = lengths - 1 if convention == "T" else lengths
        np.testing.assert_array_equal(src.lengths, want, err_msg=name)
