"""Whole-chunk encoding outside HDF5 must be what HDF5's own shuffle + deflate pipeline stores.

The reference is HDF5 itself (through h5py): a dataset written by HDF5's filter pipeline, whose
stored chunk is read back raw with ``read_direct_chunk``.
"""

import zlib

import h5py
import numpy as np
import pytest

from goalkit.write.chunkcodec import GZIP_LEVEL, gzip_chunk, shuffle_bytes


@pytest.mark.parametrize("dtype,shape", [("<f4", (64, 24)), ("<f8", (64, 6)), ("<i8", (64,)),
                                         ("u1", (64,)), ("<f4", (64,))])
def test_shuffle_matches_the_bytes_hdf5_stores(tmp_path, dtype, shape):
    rs = np.random.default_rng(3)
    x = (rs.normal(size=shape) * 100).astype(dtype)
    with h5py.File(tmp_path / "ref.h5", "w") as f:
        ds = f.create_dataset("x", data=x, chunks=shape, compression="gzip",
                              compression_opts=GZIP_LEVEL, shuffle=True)
        mask, stored = ds.id.read_direct_chunk((0,) * len(shape))
    assert mask == 0
    assert zlib.decompress(stored) == shuffle_bytes(x)        # HDF5's shuffled layout
    assert zlib.decompress(gzip_chunk(x)) == shuffle_bytes(x)


def test_hdf5_decodes_chunks_encoded_here(tmp_path):
    rs = np.random.default_rng(4)
    x = rs.normal(size=(128, 5)).astype("<f4")
    with h5py.File(tmp_path / "ours.h5", "w") as f:
        ds = f.create_dataset("x", shape=x.shape, dtype=x.dtype, chunks=(64, 5), compression="gzip",
                              compression_opts=GZIP_LEVEL, shuffle=True)
        ds.id.write_direct_chunk((0, 0), gzip_chunk(x[:64]))
        ds.id.write_direct_chunk((64, 0), gzip_chunk(x[64:]))
    with h5py.File(tmp_path / "ours.h5") as f:
        np.testing.assert_array_equal(f["x"][:], x)


def test_shuffle_of_two_byte_integers():
    # elements 0x0102 and 0x0304, little-endian: low bytes first, then high bytes
    assert shuffle_bytes(np.array([0x0102, 0x0304], dtype="<u2")) == bytes([0x02, 0x04, 0x01, 0x03])
