"""The stand-alone audit's window of whole storage chunks (goalkit/audit/run.py: _Window).

Reference: h5py's own slicing of the dataset (``dataset[a:b]``, HDF5 hyperslab reads): every
slice taken through the window must equal it, inside the window or not, and a block's rows must
be its own (changing them changes no later read). A chunk that does not decompress raises
OSError at every use, as the dataset does (the audit then reports those rows unread).
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.audit.run import _Window

ROWS, CHUNK = 1000, 128


@pytest.fixture(scope="module")
def stored(tmp_path_factory):
    path = tmp_path_factory.mktemp("window") / "rows.h5"
    g = np.random.default_rng(3)
    with h5py.File(path, "w") as f:
        grp = f.create_group("train")
        grp.create_dataset("goal", data=g.normal(size=(ROWS, 3)).astype(np.float32), chunks=(CHUNK, 3),
                           compression="gzip")
        grp.create_dataset("source_step", data=np.arange(ROWS, dtype=np.int64), chunks=(CHUNK,),
                           compression="gzip")
    return path


@settings(max_examples=200, deadline=None)
@given(first=st.integers(0, ROWS // CHUNK), chunks=st.integers(1, 4), a=st.integers(0, ROWS),
       size=st.integers(0, 3 * CHUNK))
def test_every_slice_through_the_window_equals_the_datasets_own(stored, first, chunks, a, size):
    b = min(ROWS, a + size)
    with h5py.File(stored, "r") as f:
        grp = f["train"]
        w0, w1 = first * CHUNK, min(ROWS, (first + chunks) * CHUNK)
        window = _Window(grp, "train", w0, w1)
        for name in ("goal", "source_step"):
            got = window[name][a:b]
            want = grp[name][a:b]
            assert got.dtype == want.dtype and got.shape == want.shape
            np.testing.assert_array_equal(got, want)
        assert "goal" in window and "missing" not in window


def test_a_blocks_rows_are_its_own(stored):
    with h5py.File(stored, "r") as f:
        window = _Window(f["train"], "train", 0, 2 * CHUNK)
        rows = window["source_step"][10:20]
        rows[:] = -1                                   # a block that changes its rows in place
        np.testing.assert_array_equal(window["source_step"][10:20], np.arange(10, 20))
        assert list(window.columns) == ["source_step"]  # read once, on first use


def test_a_chunk_that_does_not_decompress_raises_at_every_use(stored, tmp_path):
    bad = tmp_path / "bad.h5"
    bad.write_bytes(stored.read_bytes())
    with h5py.File(bad, "r+") as f:
        ds = f["train/goal"]
        mask, data = ds.id.read_direct_chunk((CHUNK, 0))
        ds.id.write_direct_chunk((CHUNK, 0), b"\xff" * len(data), mask)
    with h5py.File(bad, "r") as f:
        window = _Window(f["train"], "train", 0, 2 * CHUNK)
        for _ in range(2):
            with pytest.raises(OSError):
                window["goal"][0:10]                  # the window spans the damaged chunk
        np.testing.assert_array_equal(window["source_step"][0:10], np.arange(10))


def test_slices_at_the_windows_edges_equal_the_datasets_own(stored):
    with h5py.File(stored, "r") as f:
        grp = f["train"]
        for w0, w1 in ((0, CHUNK), (CHUNK, 3 * CHUNK), (ROWS - ROWS % CHUNK, ROWS)):
            window = _Window(grp, "train", w0, w1)
            edges = sorted({max(0, min(ROWS, x)) for x in (w0 - 1, w0, w0 + 1, w1 - 1, w1, w1 + 1)})
            for a in edges:
                for b in edges:
                    if b >= a:
                        np.testing.assert_array_equal(window["goal"][a:b], grp["goal"][a:b])
