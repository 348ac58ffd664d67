"""Outside check: termination and time limits as separate facts, from Gymnasium's own step API.

Episodes are recorded from MountainCar-v0 and Pendulum-v1 exactly as ``env.step`` returns them:
``terminated`` and ``truncated`` stored as two arrays (``term``, ``trunc``), never merged by us.
The environment, not goalkit, decides where episodes end and why; goalkit must read back the
same boundaries, lengths and both flags, for every storage shape, and carry both flags into a
built set as the ``termination`` and ``time_limit`` columns, distinct from ``terminal``.

Sources:
* Time limits: read from the registry (``gymnasium.spec(name).max_episode_steps``), applied by
  Gymnasium's TimeLimit wrapper, which sets ``truncated`` when the step count reaches it
  (Gymnasium documentation, "Env.step" and "TimeLimit"; Farama Foundation). The values 200 and
  200 asserted below are those of the registered specs (checked from the registry at test time;
  that both are 200 is from memory of the docs).
* MountainCar-v0 terminates when the position reaches 0.5 (Gymnasium documentation, "Mountain
  Car", Episode End; from memory); Pendulum-v1 never terminates (same docs, "Pendulum", Episode
  End: truncation at 200 steps only; from memory). Both are checked against what the environment
  returned, not assumed.
* Bootstrapping convention: a time limit is never a terminal (Pardo, Tavakoli, Levdik and
  Kormushev, 2018, "Time Limits in Reinforcement Learning", ICML, section 3).
"""

from __future__ import annotations

import gymnasium
import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from goalkit import build, load_recipe, open_logs, verify
from goalkit.cli import main as cli_main
from goalkit.logs import iter_chunks


def _mountain_car_action(obs, rng):
    """Push along the velocity (an energy-pumping rule that reaches the flag) or act at random."""
    return int(2 if obs[1] >= 0 else 0) if rng is None else int(rng.integers(3))


def record(name, episodes, seed=0):
    """Episodes of ``name`` as lists of arrays, with the step API's own flags."""
    env = gymnasium.make(name)
    rng = np.random.default_rng(seed)
    out = []
    for k in range(episodes):
        obs, _ = env.reset(seed=seed * 1000 + k)
        env.action_space.seed(seed * 1000 + k)
        states, actions, term, trunc = [obs], [], [], []
        while True:
            if name.startswith("MountainCar"):
                a = _mountain_car_action(obs, None if k % 2 == 0 else rng)
            else:
                a = env.action_space.sample()
            obs, _, terminated, truncated, _ = env.step(a)
            states.append(obs)
            actions.append(a)
            term.append(terminated)
            trunc.append(truncated)
            if terminated or truncated:
                break
        out.append({"obs": np.asarray(states, dtype=np.float64), "act": np.asarray(actions).reshape(len(actions), -1),
                    "term": np.asarray(term), "trunc": np.asarray(trunc)})
    env.close()
    return out


@pytest.fixture(scope="module")
def car():
    return record("MountainCar-v0", 6)


@pytest.fixture(scope="module")
def pendulum():
    return record("Pendulum-v1", 3, seed=1)


def test_the_recordings_hold_both_kinds_of_end(car, pendulum):
    assert gymnasium.spec("MountainCar-v0").max_episode_steps == 200
    assert gymnasium.spec("Pendulum-v1").max_episode_steps == 200
    kinds = {(bool(e["term"][-1]), bool(e["trunc"][-1])) for e in car}
    assert (True, False) in kinds and (False, True) in kinds     # both facts occur in the recording
    for e in car + pendulum:
        assert not e["term"][:-1].any() and not e["trunc"][:-1].any()
        if e["trunc"][-1]:
            assert len(e["act"]) == 200
    assert all(e["trunc"][-1] and not e["term"].any() for e in pendulum)


def stores(tmp_path, eps, tag):
    """The episodes in several storage shapes; yields (name, path, layout)."""
    keys = {"observation": "obs", "action": "act", "termination": "term", "time_limit": "trunc"}
    flat = {"obs": np.concatenate([e["obs"][:-1] for e in eps]),
            "next_obs": np.concatenate([e["obs"][1:] for e in eps]),
            "act": np.concatenate([e["act"] for e in eps]),
            "term": np.concatenate([e["term"] for e in eps]),
            "trunc": np.concatenate([e["trunc"] for e in eps]).astype(np.uint8),
            "run_id": np.repeat(np.arange(len(eps)) + 40, [len(e["act"]) for e in eps])}
    with h5py.File(tmp_path / f"{tag}-flat.h5", "w") as f:
        for k, v in flat.items():
            f[k] = v
    pairs = {**keys, "next_observation": "next_obs"}
    yield "flat, done = [term, trunc]", tmp_path / f"{tag}-flat.h5", {
        "shape": "flat", "keys": pairs, "boundaries": {"done": ["term", "trunc"]}}
    yield "flat, ids and both flags", tmp_path / f"{tag}-flat.h5", {
        "shape": "flat", "keys": pairs, "boundaries": {"episode_id": "run_id", "done": ["trunc", "term"]}}
    np.savez(tmp_path / f"{tag}-flat.npz", **flat)
    yield "npz, ids only", tmp_path / f"{tag}-flat.npz", {
        "shape": "flat", "keys": pairs, "boundaries": {"episode_id": "run_id"}}
    with h5py.File(tmp_path / f"{tag}-grouped.h5", "w") as f:
        for i, e in enumerate(eps):
            g = f.create_group(f"runs/r{i}")
            g["obs"], g["act"], g["term"], g["trunc"] = e["obs"], e["act"], e["term"], e["trunc"]
    yield "grouped T+1", tmp_path / f"{tag}-grouped.h5", {"shape": "grouped", "episode_groups": "runs/*",
                                                          "keys": keys}
    (tmp_path / f"{tag}-files").mkdir()
    for i, e in enumerate(eps):
        np.savez(tmp_path / f"{tag}-files" / f"ep{i}.npz", obs=e["obs"], act=e["act"], term=e["term"],
                 trunc=e["trunc"])
    yield "per-file T+1", tmp_path / f"{tag}-files", {"shape": "per-file", "keys": keys}


@pytest.mark.parametrize("env", ["car", "pendulum"])
def test_boundaries_lengths_and_both_flags_match_the_environment(tmp_path, env, request):
    eps = request.getfixturevalue(env)
    lengths = np.array([len(e["act"]) for e in eps])
    names = []
    for name, path, layout in stores(tmp_path, eps, env):
        src = open_logs(path, layout)
        np.testing.assert_array_equal(src.lengths, lengths, err_msg=name)
        chunks = list(iter_chunks(src, max_transitions=150))
        term = np.concatenate([c.terminations for c in chunks])
        trunc = np.concatenate([c.time_limits for c in chunks])
        assert term.dtype == bool and trunc.dtype == bool
        np.testing.assert_array_equal(term, np.concatenate([e["term"] for e in eps]), err_msg=name)
        np.testing.assert_array_equal(trunc, np.concatenate([e["trunc"] for e in eps]), err_msg=name)
        obs = np.concatenate([c.observations for c in chunks])
        np.testing.assert_array_equal(obs, np.concatenate([e["obs"] for e in eps]), err_msg=name)
        names.append(name)
    assert len(names) == 5


def test_one_flag_alone_leaves_the_last_episode_open(tmp_path, car):
    # the last recorded episode ends by termination: the time-limit flag alone cannot close it
    eps = [e for e in car if e["trunc"][-1]][:1] + [e for e in car if e["term"][-1]][:1]
    name, path, layout = next(iter(stores(tmp_path, eps, "open")))
    layout["boundaries"] = {"done": "trunc"}
    with pytest.raises(Exception, match="the done flag never ends the last episode"):
        open_logs(path, layout)
    layout["boundaries"] = {"done": ["trunc", "term"]}
    assert open_logs(path, layout).lengths.tolist() == [200, len(eps[1]["act"])]


def test_flags_that_disagree_with_the_boundaries_are_refused(tmp_path, car):
    eps = car[:2]
    with h5py.File(tmp_path / "bad.h5", "w") as f:
        f["obs"] = np.concatenate([e["obs"] for e in eps])
        f["act"] = np.concatenate([e["act"] for e in eps])
        term = np.concatenate([e["term"] for e in eps]).copy()
        term[5] = True                               # a termination inside episode 0
        f["term"] = term
        f["ids"] = np.repeat([0, 1], [len(e["act"]) for e in eps])
    layout = {"shape": "flat", "keys": {"observation": "obs", "action": "act", "termination": "term"},
              "boundaries": {"episode_id": "ids"}}
    with pytest.raises(Exception) as info:
        list(iter_chunks(open_logs(tmp_path / "bad.h5", layout)))
    msg = str(info.value)
    assert "bad.h5" in msg and "key term" in msg and "episode 0" in msg and "step 5" in msg
    assert "expected it only on the episode's last step" in msg
    skipped = open_logs(tmp_path / "bad.h5", layout, skip_bad_episodes=True)
    assert skipped.episode_ids.tolist() == [1]


def test_boundary_arrays_in_different_row_spaces_are_refused(tmp_path, car):
    eps = car[:2]
    with h5py.File(tmp_path / "spaces.h5", "w") as f:
        f["obs"] = np.concatenate([e["obs"] for e in eps])               # T+1 per episode
        f["act"] = np.concatenate([e["act"] for e in eps])
        f["term"] = np.concatenate([e["term"] for e in eps])             # one per action
        f["ids"] = np.repeat([0, 1], [len(e["obs"]) for e in eps])       # one per observation
    layout = {"shape": "flat", "keys": {"observation": "obs", "action": "act"},
              "boundaries": {"episode_id": "ids", "done": "term"}}
    with pytest.raises(Exception, match=r"key ids\+term: the boundary arrays count different rows"):
        open_logs(tmp_path / "spaces.h5", layout)


def _recipe(tmp_path, log, layout_doc, end_on_reach, name="set"):
    from goalkit.logs.layout import layout_to_toml, parse_layout

    (tmp_path / f"{name}-layout.toml").write_text(layout_to_toml(parse_layout(layout_doc)))
    text = f"""
version = 1
seed = 3
[logs]
path = "{log}"
layout = "{name}-layout.toml"
[goal]
indices = [0]
[relabel]
goals_per_transition = 3
[relabel.weights]
final = 1
future = 2
[reward]
distance = "euclidean"
threshold = 0.01
end_on_reach = {str(end_on_reach).lower()}
[split]
validation = 0.3
[output]
path = "{name}.h5"
"""
    path = tmp_path / f"{name}-recipe.toml"
    path.write_text(text)
    return path


@pytest.mark.parametrize("end_on_reach", [False, True])
def test_a_built_set_carries_both_flags_apart_from_terminal(tmp_path, car, end_on_reach):
    stored = list(stores(tmp_path, car, "car"))
    name, log, layout = stored[1]                          # flat, ids and both flags
    recipe = load_recipe(_recipe(tmp_path, log.name, layout, end_on_reach))
    result = build(recipe)
    term_of = {i: e["term"] for i, e in enumerate(car)}
    trunc_of = {i: e["trunc"] for i, e in enumerate(car)}
    with h5py.File(result.path, "r") as f:
        seen_limit = 0
        for split in ("train", "validation"):
            g = f[split]
            ep, t = g["source_episode"][:], g["source_step"][:]
            term, limit = g["termination"][:], g["time_limit"][:]
            assert term.dtype == np.uint8 and limit.dtype == np.uint8
            want_term = np.array([term_of[a][b] for a, b in zip(ep.tolist(), t.tolist())], dtype=np.uint8)
            want_limit = np.array([trunc_of[a][b] for a, b in zip(ep.tolist(), t.tolist())], dtype=np.uint8)
            np.testing.assert_array_equal(term, want_term)
            np.testing.assert_array_equal(limit, want_limit)
            # terminal is the goal's fact only (Pardo et al., 2018): never the time limit
            np.testing.assert_array_equal(g["terminal"][:], g["reached"][:] * np.uint8(end_on_reach))
            seen_limit += int(limit.sum())
        assert seen_limit > 0
    report = verify(result.path)
    assert report.ok, report.failures


def test_verify_and_the_audit_catch_a_changed_flag(tmp_path, car):
    stored = list(stores(tmp_path, car, "car"))
    name, log, layout = stored[1]
    recipe = load_recipe(_recipe(tmp_path, log.name, layout, False, name="tamper"))
    result = build(recipe)
    with h5py.File(result.path, "r+") as f:
        col = f["train"]["time_limit"]
        values = col[:]
        values[0] = 1 - values[0]
        col[...] = values
    from goalkit.audit import audit_set

    audit = audit_set(result.path)
    assert not audit.ok
    assert any("time_limit flag" in m and "time_limit is not the log's time_limit flag" in m
               for m in audit.failures), audit.failures
    report = verify(result.path)
    assert not report.ok
    assert any("time_limit is not the log's flag of the transition" in m for m in report.failures)


def test_cli_refuses_a_bad_boundaries_table_with_one_line(tmp_path, car):
    name, log, layout = next(iter(stores(tmp_path, car[:2], "cli")))
    (tmp_path / "lay.toml").write_text('version = 1\nshape = "flat"\n[keys]\nobservation = "obs"\n'
                                       'action = "act"\n[boundaries]\ndone = []\n')
    res = CliRunner().invoke(cli_main, ["scan", str(log), "--layout", str(tmp_path / "lay.toml")])
    assert res.exit_code == 2
    lines = res.stderr.strip().splitlines() if res.stderr_bytes is not None else res.output.strip().splitlines()
    assert len(lines) == 1 and "key boundaries.done" in lines[0] and "lay.toml" in lines[0]


def test_over_several_files_and_sources(tmp_path, car, pendulum):
    """MountainCar episodes cut over three flat files (HDF5 and NPZ) of one source, and Pendulum
    episodes in a grouped file of another: boundaries, lengths and both flags as the environments
    reported them, and a built set verified."""
    from goalkit.logs.layout import layout_to_toml, parse_layout
    from goalkit.logs.multi import open_sources
    from goalkit.archive import SourceSpec

    cuts = [(0, 2), (2, 3), (3, len(car))]
    pairs = {"shape": "flat", "keys": {"observation": "obs", "next_observation": "next_obs", "action": "act",
                                       "termination": "term", "time_limit": "trunc"},
             "boundaries": {"done": ["term", "trunc"]}}
    for i, (a, b) in enumerate(cuts):
        eps = car[a:b]
        arrays = {"obs": np.concatenate([e["obs"][:-1] for e in eps]),
                  "next_obs": np.concatenate([e["obs"][1:] for e in eps]),
                  "act": np.concatenate([e["act"] for e in eps]).astype(np.float64),
                  "term": np.concatenate([e["term"] for e in eps]),
                  "trunc": np.concatenate([e["trunc"] for e in eps])}
        if i == 1:
            np.savez(tmp_path / f"car-{i}.npz", **arrays)
        else:
            with h5py.File(tmp_path / f"car-{i}.h5", "w") as f:
                for k, v in arrays.items():
                    f[k] = v
    with h5py.File(tmp_path / "pend.h5", "w") as f:
        for i, e in enumerate(pendulum):
            g = f.create_group(f"runs/r{i}")
            g["obs"], g["act"], g["term"], g["trunc"] = e["obs"], e["act"], e["term"], e["trunc"]
    grouped = {"shape": "grouped", "episode_groups": "runs/*",
               "keys": {"observation": {"key": "obs", "columns": [0, 1]}, "action": "act",
                        "termination": "term", "time_limit": "trunc"}}
    # observations of one width for both: MountainCar (2) and Pendulum's cos/sin columns 0, 1
    specs = [SourceSpec("car", (str(tmp_path / "car-*"),), parse_layout(pairs)),
             SourceSpec("pendulum", (str(tmp_path / "pend.h5"),), parse_layout(grouped))]
    src = open_sources(specs, named=True)
    want = {"car": car, "pendulum": pendulum}
    for code, name in enumerate(src.source_names):
        mine = src.episode_sources == code
        eps = want[name]
        np.testing.assert_array_equal(src.lengths[mine], [len(e["act"]) for e in eps])
        pos = np.flatnonzero(mine)
        chunk = src.read(int(pos[0]), int(pos[-1]) + 1)
        np.testing.assert_array_equal(chunk.terminations, np.concatenate([e["term"] for e in eps]))
        np.testing.assert_array_equal(chunk.time_limits, np.concatenate([e["trunc"] for e in eps]))
        assert set(chunk.sources.tolist()) == {code}
    (tmp_path / "car.toml").write_text(layout_to_toml(parse_layout(pairs)))
    (tmp_path / "pend.toml").write_text(layout_to_toml(parse_layout(grouped)))
    (tmp_path / "r.toml").write_text("""
version = 1
[[sources]]
name = "car"
path = ["car-0.h5", "car-1.npz", "car-2.h5"]
layout = "car.toml"
[[sources]]
name = "pendulum"
path = "pend.h5"
layout = "pend.toml"
[goal]
indices = [0]
[relabel.weights]
future = 1
[reward]
threshold = 0.05
[output]
path = "both.h5"
""")
    result = build(load_recipe(tmp_path / "r.toml"))
    with h5py.File(result.path, "r") as f:
        for s in ("train", "validation"):
            g = f[s]
            src_code, limit = g["source"][:], g["time_limit"][:]
            last = g["source_step"][:] == 199
            # Pendulum: every last step is a time limit; MountainCar: time limits only at step 199
            assert np.all(limit[src_code == 1] == last[src_code == 1])
            assert np.all(limit[~last] == 0)
    report = verify(result.path)
    assert report.ok, report.failures


@pytest.mark.parametrize("env", ["car", "pendulum"])
def test_the_proposed_layout_reads_the_recordings_as_recorded(tmp_path, env, request):
    """The layout `goalkit scan` proposes for the recordings (confirmed as it is) gives the
    environment's boundaries, lengths and both flags, in every storage shape."""
    from goalkit.logs import propose_layout

    eps = request.getfixturevalue(env)
    lengths = [len(e["act"]) for e in eps]
    seen = set()
    for name, path, _ in stores(tmp_path, eps, env):
        if path in seen:
            continue
        seen.add(path)
        lay = propose_layout(path)
        assert lay.keys.termination == "term" and lay.keys.time_limit == "trunc", name
        src = open_logs(path, lay)
        assert src.lengths.tolist() == lengths, name
        es = src.read(0, len(eps))
        np.testing.assert_array_equal(es.terminations, np.concatenate([e["term"] for e in eps]), err_msg=name)
        np.testing.assert_array_equal(es.time_limits, np.concatenate([e["trunc"] for e in eps]), err_msg=name)
    assert len(seen) == 4
    # without an id array, the flags themselves are the proposed boundaries
    flat = {"obs": np.concatenate([e["obs"][:-1] for e in eps]), "next_obs": np.concatenate([e["obs"][1:] for e in eps]),
            "acts": np.concatenate([e["act"] for e in eps]), "terminated": np.concatenate([e["term"] for e in eps]),
            "truncated": np.concatenate([e["trunc"] for e in eps])}
    np.savez(tmp_path / "bare.npz", **flat)
    lay = propose_layout(tmp_path / "bare.npz")
    assert lay.boundaries.done == ("terminated", "truncated") and lay.keys.action == "acts"
    assert open_logs(tmp_path / "bare.npz", lay).lengths.tolist() == lengths
