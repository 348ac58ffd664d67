"""The dataset writer: atomic output, canonical block order, checksums."""

import hashlib

import h5py
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from goalkit.errors import DatasetError
from goalkit.write.writer import SetWriter

COLUMNS = {"x": (np.dtype("float32"), (3,)), "k": (np.dtype("int64"), ())}


def rows(n, seed=0):
    rs = np.random.default_rng(seed)
    keys = np.cumsum(rs.integers(1, 5, size=n))
    split = rs.random(n) < 0.3
    return {"x": rs.normal(size=(n, 3)).astype(np.float32), "k": keys}, keys, split


def write(path, cols, keys, split, cuts, chunk_rows=16, sized=False, compression="none"):
    """Feed the rows to a writer in pieces ending at ``cuts``, one flush per piece.

    ``sized``: announce each split's row count (datasets created at their final size).
    """
    total = {"train": int((~split).sum()), "validation": int(split.sum())} if sized else None
    with SetWriter(path, COLUMNS, chunk_rows=chunk_rows, compression=compression, total_rows=total) as w:
        a = 0
        for b in list(cuts) + [len(keys)]:
            for name, mask in (("train", ~split[a:b]), ("validation", split[a:b])):
                w.add(name, {c: v[a:b][mask] for c, v in cols.items()}, keys[a:b][mask])
            w.flush()
            a = b
        w.close({"note": "test"})
    return hashlib.sha256(path.read_bytes()).hexdigest()


@settings(max_examples=30, deadline=None)
@given(n=st.integers(1, 300), cuts=st.lists(st.integers(1, 299), max_size=12), chunk=st.sampled_from([16, 33]),
       sized=st.booleans(), compression=st.sampled_from(["none", "none", "lzf"]))
def test_bytes_do_not_depend_on_how_rows_are_fed(tmp_path_factory, n, cuts, chunk, sized, compression):
    # whole chunks of an unfiltered set go to HDF5 as raw chunks, the rest through selections:
    # either way the values read back are the rows given, and the bytes do not depend on feeding
    d = tmp_path_factory.mktemp("w")
    cols, keys, split = rows(n)
    one = write(d / "a.h5", cols, keys, split, [], chunk, sized, compression)
    many = write(d / "a.h5", cols, keys, split, sorted({c for c in cuts if c < n}), chunk, sized, compression)
    assert one == many
    with h5py.File(d / "a.h5") as f:
        np.testing.assert_array_equal(f["train"]["k"][:], keys[~split])
        np.testing.assert_array_equal(f["train"]["x"][:], cols["x"][~split])
        np.testing.assert_array_equal(f["validation"]["x"][:], cols["x"][split])
        np.testing.assert_array_equal(f["validation"]["k"][:], keys[split])
        assert f["train"].attrs["rows"] == int((~split).sum())


def test_manifest_is_the_sha256_of_each_column(tmp_path):
    import json

    cols, keys, split = rows(100)
    write(tmp_path / "m.h5", cols, keys, split, [40])
    with h5py.File(tmp_path / "m.h5") as f:
        manifest = json.loads(f.attrs["manifest"])
        for key, digest in manifest.items():
            s, c = key.split("/")
            assert hashlib.sha256(f[s][c][:].tobytes()).hexdigest() == digest


def test_failure_leaves_nothing_behind(tmp_path):
    cols, keys, split = rows(50)
    out = tmp_path / "out.h5"
    with pytest.raises(RuntimeError):
        with SetWriter(out, COLUMNS, chunk_rows=16) as w:
            w.add("train", cols, keys)
            w.flush()
            raise RuntimeError("interrupted")
    assert list(tmp_path.iterdir()) == []


def test_missing_output_folder(tmp_path):
    with pytest.raises(DatasetError, match="output folder does not exist"):
        SetWriter(tmp_path / "nope" / "out.h5", COLUMNS)
