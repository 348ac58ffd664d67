"""Every reader shape and observation convention gives back the logged episodes exactly."""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from goalkit.logs import iter_chunks, open_logs
from goalkit.logs.episodes import kept_task_ids, read_task_ids
from goalkit.logs.npzfile import NpzArrays
from logs_testdata import (assert_matches, make_episodes, truth, write_flat, write_grouped,
                           write_per_file)

LENGTHS = [3, 1, 7, 2, 5, 4, 1, 6, 2, 3, 8, 2]   # 1-step episodes are accepted
CONVENTIONS = ["T+1", "pairs", "T"]


def check_source(src, eps, *, fields=None):
    E = len(eps)
    np.testing.assert_array_equal(src.lengths, [len(e["act"]) for e in eps])
    assert src.lengths.dtype == np.int64 and src.episode_ids.dtype == np.int64
    np.testing.assert_array_equal(src.episode_ids, np.arange(E))
    assert_matches(src.read(0, E), eps, list(range(E)))
    for a, b in [(0, 1), (2, 5), (E - 1, E), (4, 4 + 3), (1, 1)]:
        a, b = min(a, E), min(b, E)
        if a == b:
            empty = src.read(a, b)
            assert empty.num_episodes == 0 and empty.observations.shape == (0, 5)
            continue
        assert_matches(src.read(a, b), eps, list(range(a, b)))
    chunks = list(iter_chunks(src, max_transitions=4))
    assert len(chunks) >= min(E, 3)
    assert np.concatenate([c.episode_ids for c in chunks]).tolist() == list(range(E))
    whole = truth(eps)
    np.testing.assert_array_equal(np.concatenate([c.observations for c in chunks]), whole["observations"])
    if fields is not None:
        assert src.fields == fields
    # the task ids the reader knows from opening are those its reads give, episode by episode
    known, read = kept_task_ids(src, 4), read_task_ids(src, 4)
    if read is None:
        assert known is None
    else:
        assert known.dtype == np.int64
        np.testing.assert_array_equal(known, read)
        np.testing.assert_array_equal(known, whole["task_ids"])


@pytest.mark.parametrize("convention", CONVENTIONS)
def test_grouped_all_conventions(tmp_path, convention):
    eps = make_episodes(LENGTHS, seed=1)
    table = write_grouped(tmp_path / "g.h5", eps, convention)
    src = open_logs(tmp_path / "g.h5", table)
    check_source(src, eps)
    assert src.convention == convention
    assert src.files == [str(tmp_path / "g.h5")]
    es = src.read(0, 2)
    assert es.observations.dtype == np.float32          # stored float32 stays float32
    assert es.actions.shape == (LENGTHS[0] + LENGTHS[1], 3)
    assert es.frames.dtype == np.uint8 and es.frames.shape == (LENGTHS[0] + LENGTHS[1] + 2, 4, 5)
    dropped = [n for n in src.notes if "last action" in n]
    assert bool(dropped) == (convention == "T")


@pytest.mark.parametrize("task_as", ["attr", "scalar", "array"])
def test_grouped_task_ids_and_fields(tmp_path, task_as):
    eps = make_episodes([4, 2, 5], seed=2)
    table = write_grouped(tmp_path / "g.h5", eps, task_as=task_as, fields=True)
    src = open_logs(tmp_path / "g.h5", table)
    check_source(src, eps, fields={"head": (0, 3), "trays": (3, 5)})
    np.testing.assert_array_equal(src.read(0, 3).task_ids, [0, 1, 2])


def test_grouped_natural_order_and_nesting(tmp_path):
    eps = make_episodes([2, 3, 4, 5], seed=3)
    # written in an order where plain string sorting would put ep10 before ep2
    names = ["ep10", "ep2", "ep1", "ep33"]
    write_grouped(tmp_path / "g.h5", eps, names=names)
    src = open_logs(tmp_path / "g.h5", {"shape": "grouped", "episode_groups": "runs/ep*",
                                        "keys": {"observation": "obs", "action": "act"}})
    # natural order: ep1, ep2, ep10, ep33 -> episodes 2, 1, 0, 3 of the written list
    assert_matches(src.read(0, 4), [eps[2], eps[1], eps[0], eps[3]], [0, 1, 2, 3])
    with h5py.File(tmp_path / "n.h5", "w") as f:
        for day, group in [("day2", [0, 1]), ("day10", [2, 3])]:
            for j, i in enumerate(group):
                g = f.create_group(f"log/{day}/run{j}")
                g["obs"], g["act"] = np.concatenate([eps[i]["head"], eps[i]["trays"]], 1), eps[i]["act"]
    src = open_logs(tmp_path / "n.h5", {"shape": "grouped", "episode_groups": "log/*/*",
                                        "keys": {"observation": "obs", "action": "act"}})
    assert src.lengths.tolist() == [2, 3, 4, 5]
    assert_matches(src.read(1, 3), eps, [1, 2])


@pytest.mark.parametrize("convention", CONVENTIONS)
@pytest.mark.parametrize("boundary", ["episode_id", "done", "offsets", "starts"])
def test_flat_hdf5(tmp_path, convention, boundary):
    eps = make_episodes(LENGTHS if convention != "T" else [max(2, n) for n in LENGTHS], seed=4)
    table = write_flat(tmp_path / "f.h5", eps, convention, boundary)
    src = open_logs(tmp_path / "f.h5", table)
    assert src.convention == convention
    check_source(src, eps)


@pytest.mark.parametrize("boundary", ["episode_id", "done", "offsets"])
def test_flat_boundaries_aligned_with_states(tmp_path, boundary):
    """T+1 observations with an id/done/offsets array counted in observation rows."""
    eps = make_episodes(LENGTHS, seed=5)
    table = write_flat(tmp_path / "f.h5", eps, "T+1", boundary, aligned="state")
    check_source(open_logs(tmp_path / "f.h5", table), eps)


@pytest.mark.parametrize("fmt", ["npz", "npz-compressed"])
@pytest.mark.parametrize("convention", CONVENTIONS)
def test_flat_npz(tmp_path, fmt, convention):
    eps = make_episodes([3, 2, 6, 4, 2, 5], seed=6)
    table = write_flat(tmp_path / "f.npz", eps, convention, "done", fmt=fmt)
    src = open_logs(tmp_path / "f.npz", table)
    check_source(src, eps)
    # backwards after forwards (a compressed member restarts its stream)
    assert_matches(src.read(4, 6), eps, [4, 5])
    assert_matches(src.read(0, 2), eps, [0, 1])


@pytest.mark.parametrize("convention", CONVENTIONS)
@pytest.mark.parametrize("compressed", [False, True])
def test_per_file(tmp_path, convention, compressed):
    eps = make_episodes([3, 2, 6, 4, 5], seed=7)
    names = ["ep10.npz", "ep2.npz", "ep1.npz", "ep30.npz", "ep3.npz"]
    table = write_per_file(tmp_path / "d", eps, convention, names=names, compressed=compressed)
    (tmp_path / "d" / "notes.txt").write_text("not an episode")
    src = open_logs(tmp_path / "d", table)
    order = [2, 1, 4, 0, 3]                          # ep1, ep2, ep3, ep10, ep30
    check_source(src, [eps[i] for i in order])
    assert [p.rsplit("/", 1)[1] for p in src.files] == ["ep1.npz", "ep2.npz", "ep3.npz", "ep10.npz", "ep30.npz"]


def test_integer_observations_become_float64_and_1d_actions_2d(tmp_path):
    with h5py.File(tmp_path / "g.h5", "w") as f:
        g = f.create_group("runs/a")
        g["obs"] = np.arange(8, dtype=np.int16).reshape(4, 2)
        g["act"] = np.array([0, 1, 1], dtype=np.int64)     # discrete actions (T,)
    src = open_logs(tmp_path / "g.h5", {"shape": "grouped", "episode_groups": "runs/*",
                                        "keys": {"observation": "obs", "action": "act"}})
    es = src.read(0, 1)
    assert es.observations.dtype == np.float64
    np.testing.assert_array_equal(es.observations, np.arange(8).reshape(4, 2))
    assert es.actions.shape == (3, 1) and es.actions[:, 0].tolist() == [0, 1, 1]


def test_read_touches_only_requested_episodes(tmp_path):
    """A NaN in episode 3 does not stop reading episodes 0-2; reading episode 3 names it."""
    eps = make_episodes([3, 4, 2, 5, 3], seed=8)
    eps[3]["head"][2, 1] = np.nan                      # state 2 of episode 3
    for path, table in [(tmp_path / "g.h5", None), (tmp_path / "f.h5", None)]:
        if path.name == "g.h5":
            table = write_grouped(path, eps)
        else:
            table = write_flat(path, eps, "T+1", "offsets")
        src = open_logs(path, table)
        assert_matches(src.read(0, 3), eps, [0, 1, 2])
        assert_matches(src.read(4, 5), eps, [4])
        with pytest.raises(Exception) as info:
            src.read(2, 4)
        msg = str(info.value)
        assert "episode 3" in msg and "step 2" in msg and "NaN" in msg


@pytest.mark.parametrize("compressed", [False, True])
def test_npz_row_slices_equal_np_load(tmp_path, compressed):
    rng = np.random.default_rng(9)
    arrays = {"a": rng.normal(size=(1000, 3)).astype(np.float32), "b": np.arange(1000),
              "c": rng.integers(0, 255, size=(1000, 2, 3), dtype=np.uint8), "s": np.float64(2.5),
              "f": np.asfortranarray(rng.normal(size=(50, 4)))}
    (np.savez_compressed if compressed else np.savez)(tmp_path / "x.npz", **arrays)
    lazy = NpzArrays(tmp_path / "x.npz")
    with np.load(tmp_path / "x.npz", allow_pickle=False) as ref:
        for name in ("a", "b", "c"):
            for a, b in [(0, 10), (500, 730), (990, 1000), (100, 120), (0, 1000)]:
                np.testing.assert_array_equal(lazy.read(name, a, b), ref[name][a:b])
        assert lazy.read("s") == 2.5
        np.testing.assert_array_equal(lazy.read("f", 5, 9), ref["f"][5:9])
    assert lazy.shape("c") == (1000, 2, 3) and lazy.dtype("a") == np.float32


def test_source_pickles(tmp_path):
    """Sources travel to worker processes: they hold paths and metadata, not open files."""
    import pickle

    eps = make_episodes([3, 4, 2], seed=10)
    table = write_flat(tmp_path / "f.npz", eps, "T+1", "done", fmt="npz-compressed")
    src = open_logs(tmp_path / "f.npz", table)
    src.read(1, 2)
    again = pickle.loads(pickle.dumps(src))
    assert_matches(again.read(0, 3), eps, [0, 1, 2])


@pytest.mark.parametrize("boundary", ["episode_id", "done"])
def test_flat_open_reads_boundaries_and_tasks_block_by_block(tmp_path, monkeypatch, boundary):
    """With tiny blocks (7 rows) opening gives the same episodes and task ids."""
    import goalkit.logs.flat as flat_mod

    eps = make_episodes(LENGTHS, seed=12)
    table = write_flat(tmp_path / "f.h5", eps, "T+1", boundary)
    whole = open_logs(tmp_path / "f.h5", table)
    monkeypatch.setattr(flat_mod, "BLOCK_ROWS", 7)
    src = open_logs(tmp_path / "f.h5", table)
    np.testing.assert_array_equal(src.lengths, whole.lengths)
    np.testing.assert_array_equal(src.task_of, [e["task"] for e in eps])
    check_source(src, eps)
    # a task id changing inside an episode that spans two blocks is still found
    with h5py.File(tmp_path / "f.h5", "a") as f:
        f["task"][9] = 42                      # episode 2 owns action rows 4..10
    with pytest.raises(Exception, match="episode 2: step 5: expected one task id per episode"):
        open_logs(tmp_path / "f.h5", table)
