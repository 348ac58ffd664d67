"""`goalkit.open_logs` takes a list of files, globs and folders, expanded and ordered as a
recipe's `[logs] path` list (goalkit.logs.multi.expand_entries), with the same errors."""

from __future__ import annotations

import os

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import goalkit
from goalkit import LogError, open_logs
from goalkit.logs import iter_chunks

LAYOUT = {"shape": "flat", "keys": {"observation": "obs", "action": "act"}, "boundaries": {"episode_id": "ids"}}


def write_flat(path, eps):
    """Episodes (obs (T+1, 2), act (T, 1)) as one flat log of T+1 rows per episode."""
    obs = np.concatenate([o for o, _ in eps])
    act = np.concatenate([np.vstack([a, np.zeros((1, 1))]) for _, a in eps])
    ids = np.repeat(np.arange(len(eps)), [len(o) for o, _ in eps])
    if str(path).endswith(".npz"):
        np.savez(path, obs=obs, act=act, ids=ids)
    else:
        with h5py.File(path, "w") as f:
            f["obs"], f["act"], f["ids"] = obs, act, ids


def episodes(seed, n):
    r = np.random.default_rng(seed)
    return [(r.normal(size=(t + 1, 2)), r.normal(size=(t, 1))) for t in r.integers(1, 6, n)]


def read_all(src):
    chunks = list(iter_chunks(src, max_transitions=7))
    return (np.concatenate([c.observations for c in chunks]), np.concatenate([c.actions for c in chunks]),
            np.asarray(src.lengths))


def test_natural_order_whatever_the_list_order_and_folders_and_globs(tmp_path):
    parts = {name: episodes(i, 2) for i, name in enumerate(["day2.h5", "day10.h5", "day1.npz"])}
    (tmp_path / "late").mkdir()
    for name, eps in parts.items():
        write_flat(tmp_path / ("late" if name == "day10.h5" else "") / name, eps)
    want = parts["day1.npz"] + parts["day2.h5"] + parts["day10.h5"]
    lists = ([tmp_path / "late", tmp_path / "day*.*"], [str(tmp_path / "day2.h5"), tmp_path / "day1.npz",
                                                         str(tmp_path / "late" / "day10.h5")])
    for entries in lists:
        src = open_logs(entries, LAYOUT)
        assert [os.path.basename(f) for f in src.files] == ["day1.npz", "day2.h5", "day10.h5"]
        obs, act, lengths = read_all(src)
        np.testing.assert_array_equal(obs, np.concatenate([o for o, _ in want]))
        np.testing.assert_array_equal(lengths, [len(a) for _, a in want])
        assert src.episode_ids.tolist() == list(range(len(want)))
    # one glob given as a string, and a folder of HDF5 files given alone, are several logs too
    assert open_logs(str(tmp_path / "day*.*"), LAYOUT).num_episodes == 4
    assert open_logs(tmp_path / "late", LAYOUT).lengths.tolist() == [len(a) for _, a in parts["day10.h5"]]
    # the public scan takes the same list
    assert goalkit.scan(lists[1], LAYOUT)["episodes"] == 6


def test_a_list_holding_one_file_is_that_log(tmp_path):
    write_flat(tmp_path / "a.h5", episodes(3, 3))
    one, listed = open_logs(tmp_path / "a.h5", LAYOUT), open_logs([tmp_path / "a.h5"], LAYOUT)
    np.testing.assert_array_equal(read_all(one)[0], read_all(listed)[0])
    assert type(one) is type(listed)


def test_same_errors_as_a_recipe_list(tmp_path):
    write_flat(tmp_path / "a.h5", episodes(3, 3))
    with pytest.raises(LogError, match=r"the pattern .*nope-\*\.h5 matches no file"):
        open_logs([tmp_path / "a.h5", tmp_path / "nope-*.h5"], LAYOUT)
    with pytest.raises(LogError, match=r"gone\.h5: file not found"):
        open_logs([tmp_path / "a.h5", tmp_path / "gone.h5"], LAYOUT)
    (tmp_path / "empty").mkdir()
    with pytest.raises(LogError, match=r"empty: the folder holds no \.h5"):
        open_logs([tmp_path / "a.h5", tmp_path / "empty"], LAYOUT)
    with pytest.raises(goalkit.LayoutError, match="empty list"):
        open_logs([], LAYOUT)
    np.savez(tmp_path / "wide.npz", obs=np.zeros((4, 5)), act=np.zeros((4, 1)), ids=np.zeros(4, int))
    with pytest.raises(LogError, match=r"wide\.npz: observation width is 5, but 2 in .*a\.h5"):
        open_logs([tmp_path / "a.h5", tmp_path / "wide.npz"], LAYOUT)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(n=st.integers(1, 9), cuts=st.lists(st.integers(0, 9), max_size=4), data=st.data())
def test_files_of_a_random_cut_read_as_the_concatenated_log(tmp_path_factory, n, cuts, data):
    """Any cut of an archive into files, listed in any order, reads as the whole archive."""
    folder = tmp_path_factory.mktemp("cut")
    eps = episodes(n, n)
    bounds = sorted({0, n, *[min(c, n) for c in cuts]})
    names = []
    for k, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
        name = folder / (f"part{k + 1}." + data.draw(st.sampled_from(["h5", "npz"])))
        write_flat(name, eps[a:b])
        names.append(name)
    order = data.draw(st.permutations(names))
    obs, act, lengths = read_all(open_logs(order, LAYOUT))
    whole = folder / "whole.h5"
    write_flat(whole, eps)
    w_obs, w_act, w_len = read_all(open_logs(whole, LAYOUT))
    np.testing.assert_array_equal(obs, w_obs)
    np.testing.assert_array_equal(act, w_act)
    np.testing.assert_array_equal(lengths, w_len)
