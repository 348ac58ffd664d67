"""The grouped reader's low-level planning and one-pass read (goalkit/logs/groupplan.py, groupread.py).

Reference: the arrays h5py wrote (the truth of logs_testdata) and the reader's general path,
which reads each dataset through h5py's high-level API; the fast path must give the same
bytes, dtypes and shapes, and leave every problem to the general path's exact message.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest
from logs_testdata import assert_matches, make_episodes, write_grouped

from goalkit.errors import LogError
from goalkit.logs import grouped, open_logs
from goalkit.logs.access import open_h5
from goalkit.logs.groupread import read_groups


def columns(es) -> dict:
    names = ("observations", "actions", "rewards", "success", "task_ids", "frames", "task_goals",
             "terminations", "time_limits")
    return {n: getattr(es, n) for n in names if getattr(es, n) is not None}


def general_path(src, a, b):
    """Read with the general path only (the fast path switched off for this source)."""
    src._fast = None
    try:
        return src.read(a, b)
    finally:
        del src._fast


@pytest.mark.parametrize("convention", ["T+1", "T"])
@pytest.mark.parametrize("fields", [False, True])
def test_fast_read_equals_truth_and_general_path(tmp_path, convention, fields):
    eps = make_episodes([3, 1, 5, 2, 4, 6], seed=7)
    table = write_grouped(tmp_path / "g.h5", eps, convention, fields=fields)
    src = open_logs(tmp_path / "g.h5", table)
    assert src._fast_plan() is not None                  # this log is served by the fast path
    for a, b in [(0, 6), (1, 4), (5, 6)]:
        es = src.read(a, b)
        assert_matches(es, eps, list(range(a, b)))
        ref = columns(general_path(src, a, b))
        got = columns(es)
        assert got.keys() == ref.keys()
        for name, value in ref.items():
            assert got[name].dtype == value.dtype and got[name].shape == value.shape, name
            assert got[name].tobytes() == value.tobytes(), name


def test_mixed_field_dtypes_widen_exactly(tmp_path):
    """A float32 field beside a float64 one: observations are float64, the float32 values exact."""
    eps = make_episodes([4, 3], seed=1)
    table = write_grouped(tmp_path / "g.h5", eps, fields=True)
    with h5py.File(tmp_path / "g.h5", "a") as f:
        for i, ep in enumerate(eps):
            del f[f"runs/ep{i}/trays"]
            f[f"runs/ep{i}/trays"] = ep["trays"].astype(np.float64) + 0.1
    src = open_logs(tmp_path / "g.h5", table)
    assert src._fast_plan() is not None
    es = src.read(0, 2)
    assert es.observations.dtype == np.float64
    want = np.concatenate([np.concatenate([ep["head"].astype(np.float64),
                                           ep["trays"].astype(np.float64) + 0.1], axis=1) for ep in eps])
    assert es.observations.tobytes() == want.tobytes()
    assert es.observations.tobytes() == general_path(src, 0, 2).observations.tobytes()


def test_dtype_differing_between_episodes_uses_general_path(tmp_path):
    eps = make_episodes([2, 3], seed=2)
    table = write_grouped(tmp_path / "g.h5", eps)
    with h5py.File(tmp_path / "g.h5", "a") as f:
        del f["runs/ep1/act"]
        f["runs/ep1/act"] = eps[1]["act"].astype(np.float64)
    src = open_logs(tmp_path / "g.h5", table)
    assert src.key_dtypes is None and src._fast_plan() is None
    es = src.read(0, 2)                                   # numpy's promotion, as before
    assert es.actions.dtype == np.float64
    np.testing.assert_array_equal(es.actions, np.concatenate([e["act"] for e in eps]).astype(np.float64))


def test_bad_flag_value_is_named_by_the_general_path(tmp_path):
    eps = make_episodes([3, 4, 2], seed=3)
    table = write_grouped(tmp_path / "g.h5", eps)
    with h5py.File(tmp_path / "g.h5", "a") as f:        # 0/1 flags as uint8, one value 2
        for i, ep in enumerate(eps):
            del f[f"runs/ep{i}/success"]
            f[f"runs/ep{i}/success"] = ep["success"].astype(np.uint8)
        f["runs/ep1/success"][2] = 2
    src = open_logs(tmp_path / "g.h5", table)
    assert src._fast_plan() is not None
    with open_h5(src.path) as h5:
        assert read_groups(h5, src.groups, src.metas, np.array([0, 1, 2]), src._fast_plan(), src._widths,
                           src._tails, src.layout) is None
    with pytest.raises(LogError) as err:
        src.read(0, 3)
    assert err.value.episode == 1 and err.value.step == 2 and "runs/ep1/success" in str(err.value)


def test_a_key_turned_soft_link_after_opening_is_read_by_the_general_path(tmp_path):
    eps = make_episodes([3, 2], seed=4)
    table = write_grouped(tmp_path / "g.h5", eps)
    src = open_logs(tmp_path / "g.h5", table)
    with h5py.File(tmp_path / "g.h5", "a") as f:        # moved and linked back: same values
        f.move("runs/ep1/act", "runs/ep1/act_data")
        f["runs/ep1/act"] = h5py.SoftLink("/runs/ep1/act_data")
    with open_h5(src.path) as h5:
        assert read_groups(h5, src.groups, src.metas, np.array([0, 1]), src._fast_plan(), src._widths,
                           src._tails, src.layout) is None
    assert_matches(src.read(0, 2), eps, [0, 1])


@pytest.mark.parametrize("convention,fields,task_as", [("T+1", False, "attr"), ("T", True, "attr"),
                                                       ("T+1", True, "scalar"), ("T", False, "array")])
def test_low_level_planning_gives_the_general_plan(tmp_path, monkeypatch, convention, fields, task_as):
    """plan_group's metas (steps, convention, widths, dtypes, task) equal plan_episode's."""
    eps = make_episodes([3, 1, 5, 2], seed=5)
    table = write_grouped(tmp_path / "g.h5", eps, convention, fields=fields, task_as=task_as)
    fast = open_logs(tmp_path / "g.h5", table)
    monkeypatch.setattr(grouped, "plan_keys", lambda layout: None)    # general planning only
    general = open_logs(tmp_path / "g.h5", table)
    assert fast.metas == general.metas and fast.key_dtypes == general.key_dtypes
    np.testing.assert_array_equal(fast.lengths, [3, 1, 5, 2])
    assert [m.task for m in fast.metas] == [e["task"] for e in eps]


def test_shared_dataset_is_still_refused(tmp_path):
    """A dataset hard-linked into two episodes: the low-level planning leaves it to the general one."""
    eps = make_episodes([3, 3], seed=6)
    table = write_grouped(tmp_path / "g.h5", eps)
    with h5py.File(tmp_path / "g.h5", "a") as f:
        del f["runs/ep1/rew"]
        f["runs/ep1/rew"] = f["runs/ep0/rew"]
    with pytest.raises(LogError) as err:
        open_logs(tmp_path / "g.h5", table)
    assert err.value.episode == 1 and "is the same dataset as key runs/ep0/rew of episode 0" in str(err.value)


def test_a_dataset_grown_after_opening_is_not_read_past_the_buffer(tmp_path):
    """HDF5 refuses a read whose file extent holds more values than the planned rows; the
    general path then reads the planned rows, as it always did."""
    eps = make_episodes([3, 2], seed=8)
    table = write_grouped(tmp_path / "g.h5", eps)
    src = open_logs(tmp_path / "g.h5", table)
    with h5py.File(tmp_path / "g.h5", "a") as f:
        del f["runs/ep1/rew"]
        f["runs/ep1/rew"] = np.concatenate([eps[1]["rew"], np.float32([9.0] * 5)])
    with open_h5(src.path) as h5:
        assert read_groups(h5, src.groups, src.metas, np.array([0, 1]), src._fast_plan(), src._widths,
                           src._tails, src.layout) is None
    assert_matches(src.read(0, 2), eps, [0, 1])
