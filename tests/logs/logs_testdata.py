"""Invented unit-test logs (irrigation-gantry flavoured) written in every supported shape.

Truth is a list of episodes with ``T`` transitions each: ``head`` (T+1, 3) float32 head position,
``trays`` (T+1, 2) float32 tray positions, ``act`` (T, 3), ``rew`` (T,), ``success`` (T,) bool,
``task`` int, ``cam`` (T+1, 4, 5) uint8 frames, ``goal`` (T, 3). Writers store them in a shape
and an observation convention; reading must give the truth back exactly.
"""

from __future__ import annotations

import os

import h5py
import numpy as np


def make_episodes(lengths, seed=0, act_dim=3):
    """Random episodes with the given transition counts."""
    rng = np.random.default_rng(seed)
    eps = []
    for i, T in enumerate(lengths):
        success = np.zeros(T, dtype=bool)
        if i % 2 == 0:
            success[-1] = True
        eps.append({
            "head": rng.uniform(0, 1, size=(T + 1, 3)).astype(np.float32),
            "trays": rng.uniform(0, 1, size=(T + 1, 2)).astype(np.float32),
            "act": rng.uniform(-1, 1, size=(T, act_dim)).astype(np.float32),
            "rew": success.astype(np.float32),
            "success": success,
            "task": i % 3,
            "cam": rng.integers(0, 256, size=(T + 1, 4, 5), dtype=np.uint8),
            "goal": np.repeat(rng.uniform(0, 1, size=(1, 3)), T, axis=0),
        })
    return eps


def obs_of(ep):
    return np.concatenate([ep["head"], ep["trays"]], axis=1)


def truth(eps, ids=None):
    """Concatenated columns of the episodes (optionally only ``ids``)."""
    sel = eps if ids is None else [eps[i] for i in ids]
    return {
        "observations": np.concatenate([obs_of(e) for e in sel]),
        "actions": np.concatenate([e["act"] for e in sel]),
        "rewards": np.concatenate([e["rew"] for e in sel]),
        "success": np.concatenate([e["success"] for e in sel]),
        "task_ids": np.array([e["task"] for e in sel]),
        "frames": np.concatenate([e["cam"] for e in sel]),
        "task_goals": np.concatenate([e["goal"] for e in sel]),
        "lengths": np.array([len(e["act"]) for e in sel]),
    }


def stored(ep, convention, rng=None):
    """The arrays of one episode as stored in a convention (observation as one array)."""
    obs, T = obs_of(ep), len(ep["act"])
    pad = np.full((1, ep["act"].shape[1]), 0.5, dtype=ep["act"].dtype)
    out = {"rew": ep["rew"], "success": ep["success"], "cam": ep["cam"], "goal": ep["goal"],
           "act": ep["act"]}
    if convention == "T+1":
        out["obs"] = obs
    elif convention == "pairs":
        out["obs"], out["next_obs"] = obs[:-1], obs[1:]
    elif convention == "T":
        # one observation per action: the last action has no following state (dropped on read)
        out["obs"] = obs
        out["act"] = np.concatenate([ep["act"], pad])
        out["rew"] = np.concatenate([ep["rew"], [0.0]]).astype(np.float32)
        out["success"] = np.concatenate([ep["success"], [False]])
        out["goal"] = np.concatenate([ep["goal"], ep["goal"][-1:]])
    else:
        raise ValueError(convention)
    return out


def keys_table(convention, fields=False):
    keys = {"action": "act", "reward": "rew", "success": "success", "task": "task",
            "frame": "cam", "task_goal": "goal"}
    if fields:
        return keys
    keys["observation"] = "obs"
    if convention == "pairs":
        keys["next_observation"] = "next_obs"
    return keys


def write_grouped(path, eps, convention="T+1", *, names=None, task_as="attr", fields=False,
                  parent="runs"):
    """One group per episode under ``parent``; returns the layout table."""
    names = names or [f"ep{i}" for i in range(len(eps))]
    with h5py.File(path, "w") as f:
        for name, ep in zip(names, eps):
            g = f.create_group(f"{parent}/{name}" if parent else name)
            s = stored(ep, convention)
            for key, value in s.items():
                if key == "obs" and fields:
                    g["head"] = ep["head"]
                    g["trays"] = ep["trays"]
                    continue
                g.create_dataset(key, data=value, chunks=True if np.ndim(value) else None)
            if task_as == "attr":
                g.attrs["task"] = ep["task"]
            elif task_as == "scalar":
                g["task"] = np.int64(ep["task"])
            else:
                g["task"] = np.full(len(s["act"]), ep["task"], dtype=np.int32)
    table = {"shape": "grouped", "episode_groups": f"{parent}/*" if parent else "*",
             "keys": keys_table(convention, fields)}
    if fields:
        table["fields"] = {"head": "head", "trays": "trays"}
    return table


def flat_arrays(eps, convention="T+1", boundary="episode_id", aligned="step"):
    """Flat arrays for the episodes and the [boundaries] table."""
    per = [stored(e, convention) for e in eps]
    arrays = {k: np.concatenate([p[k] for p in per]) for k in ("obs", "act", "rew", "success", "goal")}
    if convention == "pairs":
        arrays["next_obs"] = np.concatenate([p["next_obs"] for p in per])
    arrays["cam"] = np.concatenate([e["cam"] for e in eps])
    rows = np.array([len(p["obs"] if aligned == "state" else p["act"]) for p in per])
    step_rows = np.array([len(p["act"]) for p in per])
    arrays["task"] = np.repeat([e["task"] for e in eps], step_rows).astype(np.int64)
    if boundary == "episode_id":
        arrays["episode"] = np.repeat(np.arange(100, 100 + 7 * len(eps), 7), rows)
        table = {"episode_id": "episode"}
    elif boundary == "done":
        done = np.zeros(int(rows.sum()), dtype=bool)
        done[np.cumsum(rows) - 1] = True
        arrays["done"] = done
        table = {"done": "done"}
    elif boundary == "offsets":
        arrays["offsets"] = np.concatenate([[0], np.cumsum(rows)]).astype(np.int64)
        table = {"offsets": "offsets"}
    elif boundary == "starts":
        arrays["starts"] = np.concatenate([[0], np.cumsum(rows)[:-1]]).astype(np.int64)
        table = {"offsets": "starts"}
    else:
        raise ValueError(boundary)
    return arrays, table


def write_flat(path, eps, convention="T+1", boundary="episode_id", aligned="step", fmt="h5",
               drop=(), replace=None):
    """Write a flat log (HDF5 or .npz); returns the layout table."""
    arrays, btable = flat_arrays(eps, convention, boundary, aligned)
    arrays.update(replace or {})
    for k in drop:
        arrays.pop(k, None)
    if fmt == "h5":
        with h5py.File(path, "w") as f:
            for k, v in arrays.items():
                f.create_dataset(k, data=v, chunks=True)
    elif fmt == "npz":
        np.savez(path, **arrays)
    else:
        np.savez_compressed(path, **arrays)
    return {"shape": "flat", "keys": keys_table(convention), "boundaries": btable}


def write_per_file(directory, eps, convention="T+1", names=None, compressed=False):
    """One .npz per episode; returns the layout table."""
    os.makedirs(directory, exist_ok=True)
    names = names or [f"ep{i}.npz" for i in range(len(eps))]
    save = np.savez_compressed if compressed else np.savez
    for name, ep in zip(names, eps):
        s = stored(ep, convention)
        s["task"] = np.int64(ep["task"])
        save(os.path.join(directory, name), **s)
    return {"shape": "per-file", "file_pattern": "*.npz", "keys": keys_table(convention)}


def assert_matches(es, eps, ids):
    """Assert an EpisodeSet equals the truth of episodes ``ids`` exactly."""
    t = truth(eps, ids)
    np.testing.assert_array_equal(es.lengths, t["lengths"])
    np.testing.assert_array_equal(es.episode_ids, np.asarray(ids))
    np.testing.assert_array_equal(es.observations, t["observations"])
    np.testing.assert_array_equal(es.actions, t["actions"])
    if es.rewards is not None:
        np.testing.assert_array_equal(es.rewards, t["rewards"])
    if es.success is not None:
        np.testing.assert_array_equal(es.success, t["success"])
    if es.task_ids is not None:
        np.testing.assert_array_equal(es.task_ids, t["task_ids"])
    if es.frames is not None:
        np.testing.assert_array_equal(es.frames, t["frames"])
    if es.task_goals is not None:
        np.testing.assert_array_equal(es.task_goals, t["task_goals"])
