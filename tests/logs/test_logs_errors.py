"""Bad input: one-line errors naming file, key, episode, step; skipping bad episodes."""

from __future__ import annotations

import os

import h5py
import numpy as np
import pytest

from goalkit.errors import LayoutError, LogError
from goalkit.logs import open_logs
from logs_testdata import assert_matches, make_episodes, write_flat, write_grouped, write_per_file

LENGTHS = [3, 4, 2, 5]


def one_line(exc) -> str:
    msg = str(exc)
    assert "\n" not in msg
    return msg


def grouped(tmp_path, edit=None, **kw):
    """A good grouped log, then ``edit(h5file)``; returns (path, table, episodes)."""
    eps = make_episodes(LENGTHS, seed=11)
    path = tmp_path / "g.h5"
    table = write_grouped(path, eps, **kw)
    if edit is not None:
        with h5py.File(path, "a") as f:
            edit(f)
    return path, table, eps


def replace(f, name, data):
    del f[name]
    f[name] = data


GROUPED_CASES = {
    "missing key": (lambda f: f.__delitem__("runs/ep2/rew"), 2, None,
                    ["key runs/ep2/rew", "missing dataset; found: act, cam, goal, obs, success"]),
    "reward length": (lambda f: replace(f, "runs/ep1/rew", np.zeros(3, np.float32)), 1, None,
                      ["key runs/ep1/rew", "has 3 rows, expected 4 (one per action)"]),
    "observation rows": (lambda f: replace(f, "runs/ep3/obs", np.zeros((3, 5), np.float32)), 3, None,
                         ["key runs/ep3/obs", "has 3 rows and action has 5; expected 6 (one per state, T+1) or 5"]),
    "empty episode": (lambda f: (replace(f, "runs/ep2/act", np.zeros((0, 3), np.float32)),
                                 replace(f, "runs/ep2/obs", np.zeros((1, 5), np.float32))), 2, None,
                      ["episode is empty: 0 transitions; expected at least 1"]),
    "string observations": (lambda f: replace(f, "runs/ep0/obs", np.array([b"a"] * 4)), 0, None,
                            ["key runs/ep0/obs", "expected a numeric array, got dtype |S1"]),
    "3-D observations": (lambda f: replace(f, "runs/ep1/obs", np.zeros((5, 2, 2))), 1, None,
                         ["expected observations of shape (n,) or (n, k), got shape (5, 2, 2)"]),
    "float frames": (lambda f: replace(f, "runs/ep1/cam", np.zeros((5, 4, 5))), 1, None,
                     ["key runs/ep1/cam", "expected uint8 frames, got dtype float64"]),
    "frame count": (lambda f: replace(f, "runs/ep1/cam", np.zeros((4, 4, 5), np.uint8)), 1, None,
                    ["has 4 frames, expected 5 (one per state)"]),
    "other width": (lambda f: replace(f, "runs/ep2/obs", np.zeros((3, 4), np.float32)), 2, None,
                    ["observations T+1 with widths [4]", "expected observations T+1 with widths [5]",
                     "as in episode 0"]),
    "missing task attribute": (lambda f: f["runs/ep3"].attrs.__delitem__("task"), 3, None,
                               ["key runs/ep3/task", "missing task id"]),
    "NaN observation": (lambda f: f["runs/ep2/obs"].__setitem__((1, 3), np.nan), 2, 1,
                        ["key runs/ep2/obs", "expected finite values, got NaN or inf (first bad state)"]),
    "inf action": (lambda f: f["runs/ep1/act"].__setitem__((2, 0), np.inf), 1, 2,
                   ["key runs/ep1/act", "(first bad step)"]),
    "NaN reward": (lambda f: f["runs/ep3/rew"].__setitem__(4, np.nan), 3, 4, ["key runs/ep3/rew"]),
    "success value": (lambda f: replace(f, "runs/ep0/success", np.array([0, 2, 1], np.int8)), 0, 1,
                      ["expected a bool or 0/1 flag, got 2"]),
}


@pytest.mark.parametrize("case", list(GROUPED_CASES))
def test_grouped_episode_problems(tmp_path, case):
    edit, episode, step, parts = GROUPED_CASES[case]
    path, table, eps = grouped(tmp_path, edit)
    with pytest.raises(LogError) as info:
        src = open_logs(path, table)
        src.read(0, src.num_episodes)            # value problems surface when read
    msg = one_line(info.value)
    assert msg.startswith(f"{path}: ")
    assert f"episode {episode}" in msg
    assert info.value.episode == episode and info.value.step == step
    for p in parts:
        assert p in msg, msg
    # with skipping: the episode is skipped, counted and reported; the others read exactly
    src = open_logs(path, table, skip_bad_episodes=True)
    keep = [e for e in range(len(LENGTHS)) if e != episode]
    assert src.episode_ids.tolist() == keep
    assert [e for e, _ in src.skipped] == [episode] and parts[-1] in src.skipped[0][1]
    assert f"skipped 1 of {len(LENGTHS)} episodes (see skipped)" in src.notes
    assert_matches(src.read(0, len(keep)), eps, keep)


def test_task_id_that_changes(tmp_path):
    path, table, _ = grouped(tmp_path, lambda f: f["runs/ep1/task"].__setitem__(2, 7), task_as="array")
    with pytest.raises(LogError) as info:
        open_logs(path, table)
    msg = one_line(info.value)
    assert "key runs/ep1/task: episode 1: step 2: expected one task id per episode, the value " \
           "changes from 1 to 7" in msg


def test_every_episode_bad_is_an_error_even_when_skipping(tmp_path):
    def edit(f):
        for e in range(len(LENGTHS)):
            del f[f"runs/ep{e}/act"]
    path, table, _ = grouped(tmp_path, edit)
    with pytest.raises(LogError) as info:
        open_logs(path, table, skip_bad_episodes=True)
    assert "no usable episodes: all 4 were skipped" in one_line(info.value)


def test_file_level_problems_are_errors_even_when_skipping(tmp_path):
    path, table, _ = grouped(tmp_path)
    with pytest.raises(LogError, match=r"no groups match episode_groups = \"trials/\*\"; top-level names: runs"):
        open_logs(path, dict(table, episode_groups="trials/*"), skip_bad_episodes=True)
    with pytest.raises(LogError, match="file not found"):
        open_logs(tmp_path / "nothing.h5", table, skip_bad_episodes=True)
    data = path.read_bytes()
    (tmp_path / "cut.h5").write_bytes(data[: len(data) // 3])
    with pytest.raises(LogError) as info:
        open_logs(tmp_path / "cut.h5", table, skip_bad_episodes=True)
    assert "cut.h5" in one_line(info.value) and ("truncated" in str(info.value) or "cannot" in str(info.value))
    (tmp_path / "text.h5").write_text("episode,step\n0,1\n")
    with pytest.raises(LogError, match="not an HDF5 file"):
        open_logs(tmp_path / "text.h5", table)
    # a folder holding no log file is not a log (a folder of .h5 files is read as its files, like a
    # recipe's [logs] path; tests/logs/test_logs_open_list.py)
    (tmp_path / "notes").mkdir()
    (tmp_path / "notes" / "readme.txt").write_text("x")
    with pytest.raises(LogError, match="expected an HDF5 file, got a directory"):
        open_logs(tmp_path / "notes", table)


def flat(tmp_path, name="f.h5", **kw):
    eps = make_episodes(LENGTHS, seed=12)
    path = tmp_path / name
    fmt = kw.pop("fmt", "h5" if name.endswith(".h5") else "npz")
    table = write_flat(path, eps, fmt=fmt, **kw)
    return path, table, eps


FLAT_CASES = {
    "offsets not increasing": (dict(boundary="offsets", replace={"offsets": np.array([0, 3, 2, 9, 14])}),
                               ["key offsets", "expected non-decreasing offsets, entry 2 is 2 after 3"]),
    "missing array": (dict(drop=["rew"]), ["key rew", "missing array; found: act, cam, episode"]),
    "observation rows": (dict(replace={"obs": np.zeros((16, 5), np.float32)}),
                         ["key obs", "has 16 rows, action has 14 in 4 episodes; expected 18"]),
    "boundary length": (dict(replace={"episode": np.zeros(11, np.int64)}),
                        ["key episode", "has shape (11,); expected (14,) (one per action) or (18,)"]),
    "id comes back": (dict(replace={"episode": np.repeat([1, 2, 1, 3], LENGTHS)}),
                      ["episode id 1 comes back at row 7"]),
    "reward rows": (dict(replace={"rew": np.zeros(13)}), ["key rew", "has shape (13,); expected (14,)"]),
    "frames": (dict(replace={"cam": np.zeros((14, 4, 5), np.uint8)}),
               ["key cam", "expected uint8 frames of shape (18, H, W[, C])"]),
    "string actions": (dict(replace={"act": np.array([b"x"] * 14)}), ["key act", "expected a numeric array"]),
    "float ids": (dict(replace={"episode": np.repeat([0.0, 1.0, 2.0, 3.0], LENGTHS)}),
                  ["expected an integer episode-id array, got dtype float64"]),
}


@pytest.mark.parametrize("case", list(FLAT_CASES))
def test_flat_file_problems(tmp_path, case):
    kw, parts = FLAT_CASES[case]
    path, table, _ = flat(tmp_path, **kw)
    for skip in (False, True):                   # file-level: an error even when skipping
        with pytest.raises(LogError) as info:
            open_logs(path, table, skip_bad_episodes=skip)
        msg = one_line(info.value)
        assert msg.startswith(f"{path}: ") and info.value.episode is None
        for p in parts:
            assert p in msg, msg


def test_done_flag_that_never_ends_the_last_episode(tmp_path):
    done = np.zeros(14, dtype=bool)
    done[[2, 6, 8]] = True                       # the 5-step last episode is never ended
    path, table, eps = flat(tmp_path, boundary="done", replace={"done": done})
    with pytest.raises(LogError) as info:
        open_logs(path, table)
    msg = one_line(info.value)
    assert "key done: episode 3: step 4: the done flag never ends the last episode: its last 5 rows " \
           "have no true value; expected true on the last row" in msg
    src = open_logs(path, table, skip_bad_episodes=True)
    assert src.episode_ids.tolist() == [0, 1, 2] and src.skipped[0][0] == 3
    assert_matches(src.read(0, 3), eps, [0, 1, 2])


def test_flat_empty_episode_and_task_change_are_per_episode(tmp_path):
    eps = make_episodes(LENGTHS, seed=12)
    path, table, _ = flat(tmp_path, "p.h5", convention="pairs", boundary="offsets",
                          replace={"offsets": np.array([0, 3, 3, 7, 9, 14])})
    with pytest.raises(LogError, match="episode 1: episode is empty: 0 transitions"):
        open_logs(path, table)
    task = np.repeat([0, 1, 2, 0], LENGTHS)
    task[5] = 9
    path, table, _ = flat(tmp_path, name="t.h5", replace={"task": task})
    with pytest.raises(LogError) as info:
        open_logs(path, table)
    assert "key task: episode 1: step 2: expected one task id per episode" in one_line(info.value)
    src = open_logs(path, table, skip_bad_episodes=True)
    assert src.episode_ids.tolist() == [0, 2, 3]
    assert_matches(src.read(0, 3), eps, [0, 2, 3])


def test_flat_nan_skipped_with_step_in_reason(tmp_path):
    eps = make_episodes(LENGTHS, seed=12)
    eps[2]["act"][1, 2] = np.nan
    path = tmp_path / "f.npz"
    table = write_flat(path, eps, "T+1", "done", fmt="npz")
    src = open_logs(path, table)
    with pytest.raises(LogError) as info:
        src.read(0, 4)
    assert "key act: episode 2: step 1: expected finite values" in one_line(info.value)
    src = open_logs(path, table, skip_bad_episodes=True)
    assert src.episode_ids.tolist() == [0, 1, 3]
    assert "episode 2: step 1" in src.skipped[0][1]


def test_npz_file_problems(tmp_path):
    path, table, _ = flat(tmp_path, name="f.npz")
    data = path.read_bytes()
    (tmp_path / "cut.npz").write_bytes(data[: len(data) // 2])
    with pytest.raises(LogError) as info:
        open_logs(tmp_path / "cut.npz", table)
    assert "cut.npz" in one_line(info.value)
    (tmp_path / "junk.npz").write_bytes(b"not a zip at all")
    with pytest.raises(LogError, match="cannot open as .npz"):
        open_logs(tmp_path / "junk.npz", table)
    arrays = dict(np.load(path, allow_pickle=False))
    arrays["act"] = np.array([object()] * 14, dtype=object)
    np.savez(tmp_path / "obj.npz", **arrays)
    with pytest.raises(LogError) as info:
        open_logs(tmp_path / "obj.npz", table)
    assert "key act" in one_line(info.value) and "object" in str(info.value)


def test_per_file_problems(tmp_path):
    eps = make_episodes(LENGTHS, seed=13)
    table = write_per_file(tmp_path / "d", eps)
    with pytest.raises(LogError, match="directory not found"):
        open_logs(tmp_path / "missing", table)
    with pytest.raises(LogError, match=r"no files match file_pattern = \"\*.npy\""):
        open_logs(tmp_path / "d", dict(table, file_pattern="*.npy"), skip_bad_episodes=True)
    with pytest.raises(LogError, match="expected a directory of per-episode files, got a file"):
        open_logs(tmp_path / "d" / "ep0.npz", table)
    # a missing key in one file: per-episode, names the file
    arrays = dict(np.load(tmp_path / "d" / "ep1.npz", allow_pickle=False))
    del arrays["success"]
    np.savez(tmp_path / "d" / "ep1.npz", **arrays)
    with pytest.raises(LogError) as info:
        open_logs(tmp_path / "d", table)
    msg = one_line(info.value)
    assert msg.startswith(os.path.join(str(tmp_path / "d"), "ep1.npz")) and "key success: episode 1" in msg
    src = open_logs(tmp_path / "d", table, skip_bad_episodes=True)
    assert src.episode_ids.tolist() == [0, 2, 3]
    # a file that is not an .npz: file-level
    (tmp_path / "d" / "ep9.npz").write_text("oops")
    with pytest.raises(LogError, match="ep9.npz: cannot open as .npz"):
        open_logs(tmp_path / "d", table, skip_bad_episodes=True)


def test_single_observation_with_t_convention_is_empty(tmp_path):
    """One observation and one action per episode, T convention: 0 transitions remain."""
    os.makedirs(tmp_path / "d")
    np.savez(tmp_path / "d" / "a.npz", obs=np.zeros((3, 2)), act=np.zeros(3))
    np.savez(tmp_path / "d" / "b.npz", obs=np.zeros((1, 2)), act=np.zeros(1))
    table = {"shape": "per-file", "keys": {"observation": "obs", "action": "act"}}
    with pytest.raises(LogError) as info:
        open_logs(tmp_path / "d", table)
    assert "episode 1: episode is empty: 0 transitions (with one observation per action the last " \
           "action is dropped)" in one_line(info.value)


def test_bad_layout_argument(tmp_path):
    with pytest.raises(LayoutError, match="expected a Layout"):
        open_logs(tmp_path, 42)
    with pytest.raises(LayoutError, match="did you mean 'observation'"):
        open_logs(tmp_path, {"shape": "flat", "keys": {"observaton": "o", "action": "a"},
                             "boundaries": {"done": "d"}})


def test_nan_in_a_field_names_the_field_key(tmp_path):
    path, table, _ = grouped(tmp_path, lambda f: f["runs/ep1/trays"].__setitem__((3, 1), np.inf),
                             fields=True)
    src = open_logs(path, table)
    with pytest.raises(LogError) as info:
        src.read(0, 4)
    assert "key runs/ep1/trays: episode 1: step 3: expected finite values, got NaN or inf" in one_line(info.value)
