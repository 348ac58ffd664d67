"""Logs held open between reads in a build's own processes (goalkit/logs/held.py).

Reference: the arrays h5py wrote (the truth of logs_testdata). Holding a file open may only
change how often it is opened: every read must give the truth, a replaced file must be read
afresh, and a process that does not ask for holding must keep no file open.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
from logs_testdata import assert_matches, make_episodes, write_flat, write_grouped

from goalkit.errors import LogError
from goalkit.logs import held, open_logs


@pytest.fixture
def holding():
    held.hold_logs()
    try:
        yield
    finally:
        held.hold_logs(False)


def open_fds_to(path) -> int:
    """How many of this process's file descriptors point at ``path``."""
    target = os.path.realpath(path)
    n = 0
    for fd in os.listdir("/proc/self/fd"):
        try:
            n += os.path.realpath(os.readlink(f"/proc/self/fd/{fd}")) == target
        except OSError:
            pass
    return n


def test_without_holding_each_read_opens_and_closes(tmp_path):
    eps = make_episodes([3, 4, 2], seed=1)
    src = open_logs(tmp_path / "g.h5", write_grouped(tmp_path / "g.h5", eps))
    assert not held.holding()
    assert_matches(src.read(0, 3), eps, [0, 1, 2])
    assert open_fds_to(tmp_path / "g.h5") == 0
    with held.open_log(tmp_path / "g.h5") as a:
        pass
    with held.open_log(tmp_path / "g.h5") as b:
        assert b is not a
    assert not a.id.valid and open_fds_to(tmp_path / "g.h5") == 0


def test_a_holding_process_reuses_one_open_file_and_reads_the_truth(tmp_path, holding):
    eps = make_episodes([3, 4, 2, 5, 1], seed=2)
    path = tmp_path / "g.h5"
    src = open_logs(path, write_grouped(path, eps))
    with held.open_log(path) as first:
        pass
    for a, b in [(0, 2), (2, 5), (1, 4), (0, 5)]:
        assert_matches(src.read(a, b), eps, list(range(a, b)))
        with held.open_log(path) as again:
            assert again is first and again.id.valid
    assert open_fds_to(path) == 1
    held.release_logs()
    assert not first.id.valid and open_fds_to(path) == 0


def test_a_flat_log_is_held_too(tmp_path, holding):
    eps = make_episodes([4, 3, 6], seed=3)
    path = tmp_path / "f.h5"
    src = open_logs(path, write_flat(path, eps))
    assert_matches(src.read(0, 3), eps, [0, 1, 2])
    assert_matches(src.read(1, 2), eps, [1])
    assert open_fds_to(path) == 1


def test_a_replaced_file_is_opened_again(tmp_path, holding):
    path = tmp_path / "g.h5"
    old = make_episodes([3, 3], seed=4)
    write_grouped(path, old)
    with held.open_log(path) as first:
        np.testing.assert_array_equal(first["runs/ep0/act"][()], old[0]["act"])
    new = make_episodes([3, 3], seed=5)
    write_grouped(tmp_path / "next.h5", new)
    os.replace(tmp_path / "next.h5", path)          # another file under the same name
    with held.open_log(path) as second:
        assert second is not first
        np.testing.assert_array_equal(second["runs/ep0/act"][()], new[0]["act"])
    assert not first.id.valid                        # the stale handle was closed


def test_a_failed_read_closes_its_file_and_the_next_read_opens_afresh(tmp_path, holding):
    path = tmp_path / "g.h5"
    write_grouped(path, make_episodes([2, 2], seed=6))
    with pytest.raises(KeyError):
        with held.open_log(path) as h5:
            h5["no such dataset"]
    assert not h5.id.valid
    with held.open_log(path) as again:
        assert again is not h5 and again.id.valid


def test_a_file_that_is_not_hdf5_is_refused_as_before(tmp_path, holding):
    bad = tmp_path / "bad.h5"
    bad.write_bytes(b"not an HDF5 file at all")
    with pytest.raises(LogError, match="not an HDF5 file"):
        with held.open_log(bad):
            pass


def test_two_readers_at_once_each_get_an_open_file(tmp_path, holding):
    path = tmp_path / "g.h5"
    write_grouped(path, make_episodes([2, 3], seed=7))
    with held.open_log(path) as a, held.open_log(path) as b:
        assert a is not b and a.id.valid and b.id.valid
    assert open_fds_to(path) == 1                    # one kept, the other closed


def test_holding_stopped_during_a_read_closes_that_file_at_its_end(tmp_path):
    path = tmp_path / "g.h5"
    write_grouped(path, make_episodes([2, 2], seed=8))
    held.hold_logs()
    try:
        with held.open_log(path) as h5:
            held.hold_logs(False)            # another caller stops holding meanwhile
            assert h5.id.valid               # the read in progress keeps its file
        assert not h5.id.valid and open_fds_to(path) == 0
    finally:
        held.hold_logs(False)


def test_a_log_is_read_with_a_small_fixed_metadata_cache(tmp_path):
    # HDF5's metadata cache of a log opened for reading is fixed at METADATA_CACHE_BYTES (never
    # resized), read back through h5py's own H5Fget_mdc_config / H5Fget_mdc_size
    import h5py

    from goalkit.logs import access

    path = tmp_path / "small.h5"
    with h5py.File(path, "w") as f:
        for e in range(50):
            f[f"runs/ep{e}/act"] = np.zeros((3, 2), np.float32)
    with access.open_h5(path) as h5:
        cfg = h5.id.get_mdc_config()
        assert cfg.max_size == cfg.min_size == access.METADATA_CACHE_BYTES == 256 << 10
        assert cfg.incr_mode == cfg.decr_mode == 0
        for e in range(50):
            h5[f"runs/ep{e}/act"][()]
        assert h5.id.get_mdc_size()[0] == 256 << 10      # the cache's size stays fixed


def test_a_bug_of_ours_is_not_reported_as_a_damaged_log(tmp_path, monkeypatch):
    # a TypeError raised by goalkit's own code inside a guarded read (here a reader called with
    # the wrong arguments) propagates as itself: "the file may be truncated or corrupt" would
    # send the user to check a good log; what h5py raises on a damaged file is still a LogError
    import h5py

    from goalkit.logs import access, grouped

    eps = make_episodes([3, 2, 4], seed=31)
    table = write_grouped(tmp_path / "g.h5", eps)
    monkeypatch.setattr(grouped, "plan_group", lambda *args: None)     # takes no keyword
    monkeypatch.setattr(grouped.GroupedSource, "_plan_general", lambda self, gid: None)   # wrong arity
    with pytest.raises(TypeError):
        open_logs(tmp_path / "g.h5", table)
    monkeypatch.undo()
    # h5py's own TypeError on a type it cannot read (an HDF5 time type; h5py 3, h5t.pyx: "No
    # NumPy equivalent for TypeTimeID exists") is still a one-line LogError naming the episode
    with h5py.File(tmp_path / "g.h5", "a") as f:
        del f["runs/ep1/act"]
        h5py.h5d.create(f["runs/ep1"].id, b"act", h5py.h5t.UNIX_D32LE, h5py.h5s.create_simple((2, 2)))
    with pytest.raises(LogError) as err:
        open_logs(tmp_path / "g.h5", table)
    assert err.value.episode == 1 and "TypeTimeID" in str(err.value)
    with h5py.File(tmp_path / "g.h5", "r") as f:        # guard itself, around h5py's raise
        with pytest.raises(LogError, match="truncated or corrupt.*TypeTimeID"):
            with access.guard(str(tmp_path / "g.h5"), "runs/ep1/act", 1):
                f["runs/ep1/act"].dtype
