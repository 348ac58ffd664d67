"""Framework adapters with the real PyTorch: every row once per epoch whatever the worker count,
disjoint shards across workers and processes, pinned and checked dtypes."""

import subprocess
import sys

import numpy as np
import pytest
import torch
from torch.utils.data import DataLoader

import goalkit
from goalkit.errors import DatasetError
from goalkit.write.adapters import cast_checked

from test_epochs import build_demo


@pytest.fixture(scope="module")
def set_path(tmp_path_factory):
    return build_demo(tmp_path_factory.mktemp("adapters"), episodes=20, chunk_rows=512)


@pytest.fixture(scope="module")
def whole(set_path):
    with goalkit.open_set(set_path) as gs:
        return gs.read("train", ["observation", "action", "goal", "reward", "source_episode"])


def test_numpy_batches_pin_dtypes_and_cover_the_split(set_path, whole):
    n = len(whole["reward"])
    it = goalkit.NumpyBatches(set_path, batch_size=100, columns=["observation", "goal", "reward", "action"],
                              seed=3, dtypes={"observation": "float32", "goal": "float64"}, row_numbers=True)
    rows = []
    for b in it:
        assert b["observation"].dtype == np.float32 and b["goal"].dtype == np.float64
        assert b["action"].dtype == whole["action"].dtype  # not pinned: stored dtype
        np.testing.assert_array_equal(b["goal"], whole["goal"][b["row"]].astype(np.float64))
        rows.append(b["row"])
    first = np.concatenate(rows)
    assert np.array_equal(np.sort(first), np.arange(n))
    it.set_epoch(1)
    assert not np.array_equal(np.concatenate([b["row"] for b in it]), first)
    # two processes of a distributed job: disjoint equal shards
    parts = [np.concatenate([b["row"] for b in goalkit.NumpyBatches(set_path, batch_size=64, columns=["reward"],
                                                                     rank=r, world_size=2, row_numbers=True)])
             for r in (0, 1)]
    assert len(parts[0]) == len(parts[1]) == n // 2
    assert not set(parts[0].tolist()) & set(parts[1].tolist())


@pytest.mark.parametrize("workers", [0, 2])
def test_torch_batches_every_row_once_whatever_the_workers(set_path, whole, workers):
    n = len(whole["reward"])
    ds = goalkit.TorchBatches(set_path, batch_size=128, columns=["observation", "reward", "source_episode"],
                              seed=5, row_numbers=True)
    assert isinstance(ds, torch.utils.data.IterableDataset)
    loader = DataLoader(ds, batch_size=None, num_workers=workers)
    for epoch in (0, 1):
        ds.set_epoch(epoch)
        batches = list(loader)
        rows = torch.cat([b["row"] for b in batches]).numpy()
        # 2 workers are 2 shards: n % 2 rows sit out the epoch; no row twice, so no overlap
        assert len(rows) == len(np.unique(rows)) == n - n % max(workers, 1)
        for b in batches:
            assert b["observation"].dtype == torch.float32
            np.testing.assert_array_equal(b["source_episode"].numpy(), whole["source_episode"][b["row"].numpy()])


def test_torch_batches_shard_by_rank_and_worker(set_path, whole):
    n = len(whole["reward"])
    seen = []
    for rank in (0, 1):
        ds = goalkit.TorchBatches(set_path, batch_size=64, columns=["reward"], rank=rank, world_size=2,
                                  row_numbers=True, remainder="pad")
        seen.append(torch.cat([b["row"] for b in DataLoader(ds, batch_size=None, num_workers=2)]).numpy())
    # 4 equal shards padded from the start of the epoch's order: every row at least once
    assert len(seen[0]) == len(seen[1]) == 2 * -(-n // 4)
    assert np.array_equal(np.unique(np.concatenate(seen)), np.arange(n))


def test_torch_rows_map_style(set_path, whole):
    n = len(whole["reward"])
    ds = goalkit.TorchRows(set_path, columns=["observation", "reward", "source_episode"])
    assert len(ds) == n
    row = ds[7]
    assert row["observation"].dtype == torch.float32 and row["reward"].shape == ()
    np.testing.assert_array_equal(row["observation"].numpy(), whole["observation"][7].astype(np.float32))
    ds2 = goalkit.TorchRows(set_path, columns=["source_episode", "action"], dtypes={})
    loader = DataLoader(ds2, batch_size=50, shuffle=True, num_workers=2,
                        generator=torch.Generator().manual_seed(0))
    got = [b for b in loader]
    eps = torch.cat([b["source_episode"] for b in got]).numpy()
    assert np.array_equal(np.sort(eps), np.sort(whole["source_episode"]))
    assert got[0]["action"].dtype == torch.from_numpy(whole["action"][:1]).dtype
    with pytest.raises(IndexError):
        ds[n]
    with pytest.raises(DatasetError, match="TorchBatches"):
        goalkit.TorchRows(set_path, memory_budget=1000)


def test_checked_casts():
    assert cast_checked("x", np.array([1.5, -2.0]), "float32").dtype == np.float32
    assert cast_checked("x", np.array([3, 4], np.int64), "int16").tolist() == [3, 4]
    assert cast_checked("x", np.array([2.0, 3.0]), "int32").tolist() == [2, 3]
    with pytest.raises(DatasetError, match="column x: value 1e\\+300 does not fit float32"):
        cast_checked("x", np.array([1.0, 1e300]), "float32")
    with pytest.raises(DatasetError, match="does not fit"):
        cast_checked("x", np.array([-1]), "uint8")
    with pytest.raises(DatasetError, match="does not fit"):
        cast_checked("x", np.array([2**24 + 1], np.int64), "float32")  # float32 has a 24-bit significand
    with pytest.raises(DatasetError, match="does not fit"):
        cast_checked("x", np.array([0.5]), "int8")
    with pytest.raises(DatasetError, match="cannot cast"):
        cast_checked("x", np.array(["a"]), "float32")


def test_import_goalkit_does_not_import_torch():
    code = ("import sys, goalkit; goalkit.NumpyBatches; "
            "print('torch' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
