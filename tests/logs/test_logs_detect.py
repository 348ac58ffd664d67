"""propose_layout: the common shapes and key names are recognised; otherwise a clear error."""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from goalkit.errors import LayoutError, LogError
from goalkit.logs import open_logs, parse_layout, propose_layout
from logs_testdata import assert_matches, make_episodes, write_flat, write_grouped, write_per_file


def test_grouped_with_common_names(tmp_path):
    eps = make_episodes([3, 4, 2], seed=20)
    table = write_grouped(tmp_path / "g.h5", eps)
    lay = propose_layout(tmp_path / "g.h5")
    assert lay == parse_layout(dict(table, keys={
        "observation": "obs", "action": "act", "reward": "rew", "success": "success", "task": "task",
        "frame": "cam", "task_goal": "goal"}))
    assert_matches(open_logs(tmp_path / "g.h5").read(0, 3), eps, [0, 1, 2])


def test_grouped_state_level_arrays_become_fields(tmp_path):
    eps = make_episodes([3, 4], seed=21)
    write_grouped(tmp_path / "g.h5", eps, fields=True, parent="bench")
    lay = propose_layout(tmp_path / "g.h5")
    assert lay.episode_groups == "bench/*"
    assert lay.fields == (("head", "head"), ("trays", "trays"))
    src = open_logs(tmp_path / "g.h5")
    assert src.fields == {"head": (0, 3), "trays": (3, 5)}
    assert src.notes[0] == "no layout given: read with a proposed layout"


def test_grouped_observation_group_and_other_groups(tmp_path):
    with h5py.File(tmp_path / "g.h5", "w") as f:
        f.create_group("runs/meta").attrs["note"] = "not an episode"
        for i, name in enumerate(["trial_2", "trial_10", "trial_1"]):
            g = f.create_group(f"runs/{name}")
            g["observations/head"] = np.full((4, 3), i, dtype=np.float32)
            g["observations/trays"] = np.full((4, 2), i, dtype=np.float32)
            g["Actions"] = np.zeros((3, 2))
            g.attrs["task_id"] = i
    lay = propose_layout(tmp_path / "g.h5")
    assert lay.episode_groups == "runs/trial_*"
    assert lay.keys.action == "Actions" and lay.keys.task == "task_id"
    assert lay.fields == (("head", "observations/head"), ("trays", "observations/trays"))
    es = open_logs(tmp_path / "g.h5").read(0, 3)
    assert es.observations[::4, 0].tolist() == [2, 0, 1]     # trial_1, trial_2, trial_10
    assert es.task_ids.tolist() == [2, 0, 1]


@pytest.mark.parametrize("boundary, names", [
    ("episode_id", ("episode", "episode_id")), ("done", ("done", "done")), ("offsets", ("offsets", "offsets"))])
def test_flat_hdf5_boundaries(tmp_path, boundary, names):
    eps = make_episodes([3, 4, 2, 5], seed=22)
    write_flat(tmp_path / "f.h5", eps, "T+1", boundary)
    lay = propose_layout(tmp_path / "f.h5")
    assert lay.shape == "flat" and lay.boundaries.kind == boundary and lay.boundaries.key == names[0]
    assert_matches(open_logs(tmp_path / "f.h5").read(0, 4), eps, [0, 1, 2, 3])


def test_flat_inside_one_group_and_plural_names(tmp_path):
    eps = make_episodes([3, 4], seed=23)
    obs = np.concatenate([np.concatenate([e["head"], e["trays"]], 1)[:-1] for e in eps])
    nxt = np.concatenate([np.concatenate([e["head"], e["trays"]], 1)[1:] for e in eps])
    with h5py.File(tmp_path / "f.h5", "w") as f:
        f["data/observations"] = obs
        f["data/next_observations"] = nxt
        f["data/actions"] = np.concatenate([e["act"] for e in eps])
        f["data/terminals"] = np.array([0, 0, 1, 0, 0, 0, 1], dtype=np.uint8)
    lay = propose_layout(tmp_path / "f.h5")
    assert lay.keys.observation == "data/observations" and lay.keys.next_observation == "data/next_observations"
    assert lay.boundaries.done == ("data/terminals",)
    src = open_logs(tmp_path / "f.h5")
    assert src.convention == "pairs" and src.lengths.tolist() == [3, 4]
    assert_matches(src.read(0, 2), eps, [0, 1])


def test_flat_npz_and_directory(tmp_path):
    eps = make_episodes([3, 4, 2], seed=24)
    write_flat(tmp_path / "f.npz", eps, "T", "episode_id", fmt="npz")
    lay = propose_layout(tmp_path / "f.npz")
    assert lay.shape == "flat" and lay.boundaries.episode_id == "episode"
    src = open_logs(tmp_path / "f.npz")
    assert src.convention == "T"
    assert_matches(src.read(0, 3), eps, [0, 1, 2])
    write_per_file(tmp_path / "d", eps)
    lay = propose_layout(tmp_path / "d")
    assert lay.shape == "per-file" and lay.file_pattern == "*.npz" and lay.keys.task == "task"
    assert_matches(open_logs(tmp_path / "d").read(0, 3), eps, [0, 1, 2])


def test_what_cannot_be_decided(tmp_path):
    with h5py.File(tmp_path / "a.h5", "w") as f:
        f["pos"] = np.zeros((5, 2))
        f["cmd"] = np.zeros((4, 2))
    with pytest.raises(LayoutError) as info:
        propose_layout(tmp_path / "a.h5")
    msg = str(info.value)
    assert "could not decide the shape" in msg and "looked for act, action, actions" in msg
    assert "top level: cmd, pos" in msg
    with h5py.File(tmp_path / "b.h5", "w") as f:
        f["obs"] = np.zeros((5, 2))
        f["act"] = np.zeros((5, 2))
    with pytest.raises(LayoutError) as info:
        propose_layout(tmp_path / "b.h5")
    assert "could not find episode boundaries at the top level (found: act, obs)" in str(info.value)
    assert "write a layout with [boundaries]" in str(info.value)
    with h5py.File(tmp_path / "c.h5", "w") as f:
        f["runs/0/act"] = np.zeros((3, 2))
        f["runs/0/pos"] = np.zeros((2, 2))
    with pytest.raises(LayoutError, match="could not find the observations in episode group runs/0"):
        propose_layout(tmp_path / "c.h5")
    (tmp_path / "empty").mkdir()
    (tmp_path / "empty" / "readme.txt").write_text("x")
    with pytest.raises(LayoutError, match=r"the directory holds no .npz files \(found: readme.txt\)"):
        propose_layout(tmp_path / "empty")
    with pytest.raises(LogError, match="not found"):
        propose_layout(tmp_path / "nowhere.h5")
