"""`goalkit scan LOGS --write-recipe`: a starter recipe that builds as written, end to end.

Outside checks: the logs are Gymnasium recordings made here with the environment's own step API
(``obs, reward, terminated, truncated, info = env.step(a)``), stored as flat obs / next_obs rows
with ``terminated`` and ``truncated`` arrays, one file per "day". The set built from the starter
recipe must hold every transition the environment produced, in episodes of the lengths it
reported, with its two end flags.

Sources:
* Gymnasium documentation, "Env.step" (terminated / truncated) and "TimeLimit" (Farama
  Foundation): truncation at the registered ``max_episode_steps``, read here from
  ``gymnasium.spec(name)``. MountainCar-v0 terminates at position 0.5 and Pendulum-v1 only
  truncates (Gymnasium documentation, "Mountain Car" and "Pendulum", Episode End; from memory,
  and checked against what the environment returned).
"""

from __future__ import annotations

import json
import os
import tomllib

import gymnasium
import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from goalkit import load_recipe, make_demo, open_set
from goalkit.cli import main as cli_main
from goalkit.pipeline.starter import choose_goal, output_name, placeholder_threshold


def gk(*args):
    return CliRunner().invoke(cli_main, [str(a) for a in args])


def record(name, episodes, policy, seed=0):
    """Episodes of ``name`` as the step API returns them."""
    env = gymnasium.make(name)
    out = []
    for k in range(episodes):
        obs, _ = env.reset(seed=seed * 100 + k)
        env.action_space.seed(seed * 100 + k)
        rows = {"obs": [], "next_obs": [], "act": [], "terminated": [], "truncated": []}
        while True:
            a = policy(env, obs)
            nxt, _, term, trunc, _ = env.step(a)
            for key, v in (("obs", obs), ("next_obs", nxt), ("act", np.atleast_1d(a)), ("terminated", term),
                           ("truncated", trunc)):
                rows[key].append(v)
            obs = nxt
            if term or trunc:
                break
        out.append({k: np.asarray(v) for k, v in rows.items()})
    env.close()
    return out


def pump(env, obs):
    """MountainCar: push along the velocity (reaches the flag well before the time limit)."""
    return int(2 if obs[1] >= 0 else 0)


def at_random(env, obs):
    return env.action_space.sample()


def store_days(folder, eps, per_file):
    """The episodes as flat HDF5 files car-day1.h5, car-day2.h5, ... (natural order = recording order)."""
    folder.mkdir()
    for d in range(0, len(eps), per_file):
        part = eps[d:d + per_file]
        with h5py.File(folder / f"day{d // per_file + 1}.h5", "w") as f:
            for key in part[0]:
                f[key] = np.concatenate([e[key] for e in part])
    return folder


def set_episodes(path):
    """(episode, step) -> (termination, time_limit) and episode lengths, from every split of a set."""
    s = open_set(path)
    flags, lengths = {}, {}
    for split in ("train", "validation"):
        if not s.rows(split):
            continue
        cols = s.read(split, columns=["source_episode", "source_step", "termination", "time_limit"])
        for e, t, te, tr in zip(cols["source_episode"], cols["source_step"], cols["termination"], cols["time_limit"]):
            flags[(int(e), int(t))] = (bool(te), bool(tr))
            lengths[int(e)] = max(lengths.get(int(e), 0), int(t) + 1)
    return flags, [lengths[e] for e in sorted(lengths)]


@pytest.mark.parametrize("env_name, policy, n", [("MountainCar-v0", pump, 5), ("Pendulum-v1", at_random, 3)])
def test_gymnasium_recording_scan_write_recipe_build_verify(tmp_path, env_name, policy, n):
    eps = record(env_name, n, policy)
    limit = gymnasium.spec(env_name).max_episode_steps
    assert limit == 200
    for e in eps:   # what the environment said: one end per episode, truncation only at the limit
        assert e["terminated"][-1] or e["truncated"][-1]
        assert not (e["terminated"][:-1].any() or e["truncated"][:-1].any())
        assert not e["truncated"][-1] or len(e["act"]) == limit
    logs = store_days(tmp_path / "logs", eps, per_file=2)
    (tmp_path / "work").mkdir()
    recipe, layout = tmp_path / "work" / "start.toml", tmp_path / "work" / "start-layout.toml"
    res = gk("scan", f"{logs}/day*.h5", "--write-recipe", recipe, "--write-layout", layout, "--quiet")
    assert res.exit_code == 0, res.stderr
    doc = tomllib.loads(recipe.read_text())
    assert doc["logs"]["path"] == "../logs/day*.h5" and doc["logs"]["layout"] == "start-layout.toml"
    assert set(doc["relabel"]["weights"]) == {"future", "final"}     # no task goals: no `original`
    assert "# original = 1" in recipe.read_text() and "the logs record no task goals" in recipe.read_text()
    width = eps[0]["obs"].shape[1]
    assert doc["goal"] == {"indices": list(range(width)), "dtype": "float32"}
    assert "PLACEHOLDER" in recipe.read_text() and f"goalkit tune {recipe.name}" in recipe.read_text()
    assert tomllib.loads(layout.read_text())["boundaries"] == {"done": ["terminated", "truncated"]}
    assert gk("build", recipe, "--quiet").exit_code == 0
    out = tmp_path / "work" / "start-goals.h5"
    ver = gk("verify", out, "--quiet")
    assert ver.exit_code == 0, ver.output + ver.stderr
    flags, lengths = set_episodes(out)
    assert lengths == [len(e["act"]) for e in eps]
    for i, e in enumerate(eps):
        got = np.array([flags[(i, t)] for t in range(len(e["act"]))])
        np.testing.assert_array_equal(got[:, 0], e["terminated"])
        np.testing.assert_array_equal(got[:, 1], e["truncated"])


def test_starter_recipe_without_a_layout_file_keeps_the_layout_inline(tmp_path):
    eps = record("MountainCar-v0", 3, pump, seed=2)
    logs = store_days(tmp_path / "logs", eps, per_file=1)
    recipe = tmp_path / "car.toml"
    res = gk("scan", logs, "--write-recipe", recipe, "--json")
    assert res.exit_code == 0, res.stderr
    report = json.loads(res.stdout)
    assert report["recipe_written"] == str(recipe) and len(report["files"]) == 3
    text = recipe.read_text()
    doc = tomllib.loads(text)
    # the folder as given, and the proposed layout written in the recipe as [logs.layout]
    assert doc["logs"]["path"] == "logs" and doc["logs"]["skip_bad_episodes"] is False
    assert doc["logs"]["layout"] == {"version": 1, "shape": "flat", "boundaries": {"done": ["terminated", "truncated"]},
                                     "keys": {"observation": "obs", "next_observation": "next_obs", "action": "act",
                                              "termination": "terminated", "time_limit": "truncated"}}
    assert load_recipe(recipe).sources is not None
    assert gk("build", recipe, "--quiet").exit_code == 0
    assert gk("verify", tmp_path / "car-goals.h5", "--quiet").exit_code == 0
    assert set_episodes(tmp_path / "car-goals.h5")[1] == [len(e["act"]) for e in eps]


def test_demo_logs_get_a_starter_recipe_with_their_task_goals(tmp_path):
    demo = make_demo(tmp_path / "demo", episodes=24)
    recipe = tmp_path / "mine.toml"
    res = gk("scan", demo["logs"], "--write-recipe", recipe, "--quiet")
    assert res.exit_code == 0, res.stderr
    doc = tomllib.loads(recipe.read_text())
    # the demo's task goal is head x, y, z and the tray positions (docs/demo.md): as wide as head + trays,
    # and head_velocity (as wide as head) is left out as a rate of change
    assert doc["goal"]["fields"] == ["head", "trays"]
    assert doc["relabel"]["weights"] == {"original": 1, "future": 4, "final": 1}
    assert doc["logs"]["path"] == "demo/gantry-logs.h5"
    assert doc["logs"]["layout"]["fields"] == {"head": "head", "head_velocity": "head_velocity", "trays": "trays"}
    assert gk("build", recipe, "--quiet").exit_code == 0
    ver = gk("verify", tmp_path / "mine-goals.h5", "--quiet")
    assert ver.exit_code == 0, ver.stderr
    s = open_set(tmp_path / "mine-goals.h5")
    strategies = set(np.unique(s.read("train", columns=["strategy"])["strategy"]).tolist())
    assert strategies == {0, 1, 2}          # original, final, future (codes: docs/relabel.md)
    # the placeholder threshold is for `goalkit tune` to replace: from the logs' own success flags here
    tuned = tmp_path / "tuned.toml"
    res = gk("tune", recipe, "--from-success", "--resamples", "0", "--write-recipe", tuned, "--quiet")
    assert res.exit_code == 0, res.stderr
    new = tomllib.loads(tuned.read_text())["reward"]["threshold"]
    assert new != doc["reward"]["threshold"] and f"was euclidean {doc['reward']['threshold']}" in tuned.read_text()


def test_an_existing_recipe_is_never_replaced_and_nothing_is_written(tmp_path):
    demo = make_demo(tmp_path / "demo", episodes=4)
    recipe = tmp_path / "r.toml"
    recipe.write_text("# mine\n")
    layout = tmp_path / "l.toml"
    res = gk("scan", demo["logs"], "--write-recipe", recipe, "--write-layout", layout)
    assert res.exit_code == 2 and res.stdout == ""
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and str(recipe) in lines[0] and "already exists" in lines[0]
    assert recipe.read_text() == "# mine\n" and not layout.exists()
    # --replace is for layout files only: the recipe is still refused
    again = gk("scan", demo["logs"], "--write-recipe", recipe, "--replace")
    assert again.exit_code == 2 and recipe.read_text() == "# mine\n"
    # a recipe at an input's path (the logs) is refused before any work
    logs_bytes = open(demo["logs"], "rb").read()
    clash = gk("scan", demo["logs"], "--write-recipe", demo["logs"])
    assert clash.exit_code == 2 and len(clash.stderr.strip().splitlines()) == 1
    assert open(demo["logs"], "rb").read() == logs_bytes


@pytest.mark.parametrize("bad", ["missing.h5", "nothing-*.h5"])
def test_missing_logs_exit_2_naming_the_file_and_write_nothing(tmp_path, bad):
    eps = record("MountainCar-v0", 1, pump)
    store_days(tmp_path / "logs", eps, per_file=1)
    recipe = tmp_path / "r.toml"
    res = gk("scan", tmp_path / "logs" / "day1.h5", tmp_path / bad, "--write-recipe", recipe)
    assert res.exit_code == 2 and res.stdout == ""
    line = res.stderr.strip().splitlines()
    assert len(line) == 1 and str(tmp_path / bad) in line[0] and "Traceback" not in res.stderr
    assert not recipe.exists() and os.listdir(tmp_path) == ["logs"]


def test_undecided_detection_writes_the_partial_layout_but_no_recipe(tmp_path):
    with h5py.File(tmp_path / "arm.h5", "w") as f:
        f["rec/q"] = np.zeros((20, 5))
        f["rec/ctrl"] = np.zeros((20, 2), np.float32)
        f["rec/take"] = np.repeat(np.arange(2), 10)
    res = gk("scan", tmp_path / "arm.h5", "--write-recipe", tmp_path / "r.toml", "--write-layout",
             tmp_path / "l.toml")
    assert res.exit_code == 2 and "no recipe was written" in res.stderr
    assert (tmp_path / "l.toml").exists() and not (tmp_path / "r.toml").exists()
    # the user confirms the partial layout; then the starter recipe builds
    ok = gk("scan", tmp_path / "arm.h5", "--layout", tmp_path / "l.toml", "--write-recipe", tmp_path / "r.toml")
    assert ok.exit_code == 0, ok.stderr
    assert tomllib.loads((tmp_path / "r.toml").read_text())["logs"]["layout"] == "l.toml"
    assert gk("build", tmp_path / "r.toml", "--quiet").exit_code == 0


def test_choose_goal_and_placeholder():
    fields = {"head": (0, 3), "head_velocity": (3, 6), "trays": (6, 9)}
    g = choose_goal(fields, 9, None)
    assert g.fields == ("head", "trays") and g.columns == (0, 1, 2, 6, 7, 8) and not g.original
    assert "head_velocity" in g.why and g.no_original == "the logs record no task goals"
    g = choose_goal(fields, 9, 3)            # a 3-wide task goal: the first plain field that fits
    assert g.fields == ("head",) and g.original
    g = choose_goal(fields, 9, 5)            # nothing is 5 wide
    assert not g.original and "5 columns" in g.no_original
    g = choose_goal({}, 4, 4)
    assert g.indices == (0, 1, 2, 3) and g.original
    rng = [{"dim": i, "min": 0.0, "max": m} for i, m in enumerate((3.0, 4.0, 100.0))]
    assert placeholder_threshold(rng, (0, 1)) == 0.25          # 0.05 * hypot(3, 4)
    assert placeholder_threshold(rng, ()) == 0.01


def test_the_set_is_never_named_where_the_logs_globs_would_read_it(tmp_path):
    assert output_name(tmp_path / "start.toml", [str(tmp_path / "logs")]) == "start-goals.h5"
    assert output_name(tmp_path / "start.toml", [str(tmp_path / "*.h5")]) == "start.goalset"
    assert output_name(tmp_path / "start.toml", [str(tmp_path)]) == "start.goalset"
