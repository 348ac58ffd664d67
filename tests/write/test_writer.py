"""The dataset writer: atomic output, canonical block order, checksums."""

import hashlib
import zlib

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
    with SetWriter(path, COLUMNS, chunk_rows=chunk_rows, compression=compression, total_rows=total,
                   replace=True) as w:   # examples rewrite the same paths
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
       sized=st.booleans(), compression=st.sampled_from(["none", "gzip", "lzf"]))
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


@pytest.mark.parametrize("calls", [1, 3, 4])
def test_an_interrupt_while_the_datasets_are_created_leaves_nothing_behind(tmp_path, monkeypatch, calls):
    # Ctrl-C (KeyboardInterrupt) can arrive after the temporary file exists but before the
    # writer is a context manager's object; seen once in the Ctrl-C test of a real build
    # (tests/cli/test_interrupt.py), which then left the temporary sibling behind
    real = h5py.Group.create_dataset
    made = []

    def create(self, *args, **kwargs):
        made.append(1)
        if len(made) == calls:
            raise KeyboardInterrupt
        return real(self, *args, **kwargs)

    monkeypatch.setattr(h5py.Group, "create_dataset", create)
    with pytest.raises(KeyboardInterrupt):
        SetWriter(tmp_path / "out.h5", COLUMNS, chunk_rows=16, compression="gzip", total_rows={"train": 5})
    assert len(made) == calls and list(tmp_path.iterdir()) == []


def test_an_interrupt_while_h5py_sets_the_new_file_up_leaves_nothing_behind(tmp_path, monkeypatch):
    # the file is on disk once HDF5 created it; an interrupt before h5py hands it back must
    # not leave it there under its temporary name
    real = h5py.File.__init__

    def init(self, name, mode="r", *args, **kwargs):
        real(self, name, mode, *args, **kwargs)
        assert mode == "x" and (tmp_path / name).exists()
        raise KeyboardInterrupt

    monkeypatch.setattr(h5py.File, "__init__", init)
    with pytest.raises(KeyboardInterrupt):
        SetWriter(tmp_path / "out.h5", COLUMNS, chunk_rows=16)
    assert list(tmp_path.iterdir()) == []


def test_missing_output_folder(tmp_path):
    with pytest.raises(DatasetError, match="output folder does not exist"):
        SetWriter(tmp_path / "nope" / "out.h5", COLUMNS)


@settings(max_examples=25, deadline=None)
@given(n=st.integers(1, 200), cuts=st.lists(st.integers(1, 199), max_size=6), chunk=st.sampled_from([16, 33]),
       sized=st.booleans())
def test_deferred_gathers_write_the_same_bytes(tmp_path_factory, n, cuts, chunk, sized):
    # a column given as RowGather(source, index) is written exactly as the array source[index]
    from goalkit.write.gather import RowGather

    d = tmp_path_factory.mktemp("g")
    cols, keys, split = rows(n)
    source = np.random.default_rng(1).normal(size=(n + 7, 3)).astype(np.float32)
    index = np.random.default_rng(2).integers(0, n + 7, size=n)
    eager = dict(cols, x=source[index])
    cuts = sorted({c for c in cuts if c < n})
    want = write(d / "a.h5", eager, keys, split, cuts, chunk, sized)

    lazy_cols = {"x": RowGather(source, index), "k": cols["k"]}
    got = write_lazy(d / "a.h5", lazy_cols, keys, split, cuts, chunk, sized)
    assert got == want
    with h5py.File(d / "a.h5") as f:
        np.testing.assert_array_equal(f["train"]["x"][:], source[index][~split])


def write_lazy(path, cols, keys, split, cuts, chunk_rows, sized):
    """Like ``write``, for columns holding a RowGather: each piece is a contiguous run of rows
    of one split, as the build feeds them."""
    from goalkit.write.gather import RowGather

    total = {"train": int((~split).sum()), "validation": int(split.sum())} if sized else None
    order = {s: np.flatnonzero(m) for s, m in (("train", ~split), ("validation", split))}
    with SetWriter(path, COLUMNS, chunk_rows=chunk_rows, compression="none", total_rows=total,
                   replace=True) as w:   # examples rewrite the same paths
        a = 0
        for b in list(cuts) + [len(keys)]:
            for name in ("train", "validation"):
                rows_here = order[name][(order[name] >= a) & (order[name] < b)]
                part = {c: (RowGather(v.source, v.index[rows_here]) if isinstance(v, RowGather) else v[rows_here])
                        for c, v in cols.items()}
                w.add(name, part, keys[rows_here])
            w.flush()
            a = b
        w.close({"note": "test"})
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_row_gather_slices_and_materialises():
    from goalkit.write.gather import RowGather, materialise

    src = np.arange(12, dtype=np.float32).reshape(6, 2)
    g = RowGather(src, np.array([5, 0, 3, 3]))
    assert g.shape == (4, 2) and g.dtype == np.float32 and len(g) == 4
    np.testing.assert_array_equal(np.asarray(g[1:3]), src[[0, 3]])
    out = np.empty((4, 2), np.float64)  # another dtype: cast on the way
    g.into(out)
    np.testing.assert_array_equal(out, src[[5, 0, 3, 3]].astype(np.float64))
    cols = materialise({"a": g, "b": np.ones(4)})
    assert isinstance(cols["a"], np.ndarray) and cols["a"].shape == (4, 2)
    with pytest.raises(TypeError):
        g[[0, 1]]


@pytest.mark.parametrize("compression", ["gzip", "none"])
def test_short_last_chunk_is_stored_as_hdf5_stores_it(tmp_path, compression):
    """A split's short last chunk is encoded here and stored whole; HDF5 stores a short edge
    chunk whole too, its rows past the end at the fill value 0 (HDF5 User's Guide, "Chunking
    in HDF5", edge chunks; checked against h5py's own write of the same rows): the decoded
    chunk bytes equal those of h5py's write, and every reader sees the same rows."""
    cols, keys, split = rows(75, seed=4)
    write(tmp_path / "a.h5", cols, keys, split, [20, 41], chunk_rows=16, sized=True, compression=compression)
    filt = {"compression": "gzip", "compression_opts": 4, "shuffle": True} if compression == "gzip" else {}
    with h5py.File(tmp_path / "a.h5", "r") as got, h5py.File(tmp_path / "ref.h5", "w") as ref:
        for s in ("train", "validation"):
            for name in COLUMNS:
                d = got[f"{s}/{name}"]
                n = d.shape[0]
                assert n % 16 != 0                              # a short last chunk to look at
                r = ref.create_dataset(f"{s}/{name}", data=d[()], chunks=d.chunks, **filt)
                want = cols[name][~split if s == "train" else split]
                np.testing.assert_array_equal(d[()], want)
                last = (n // 16 * 16,) + (0,) * (d.ndim - 1)
                mine, theirs = d.id.read_direct_chunk(last)[1], r.id.read_direct_chunk(last)[1]
                if compression == "gzip":
                    mine, theirs = zlib.decompress(mine), zlib.decompress(theirs)
                assert mine == theirs and len(mine) == 16 * d.dtype.itemsize * int(np.prod(d.shape[1:]))
