"""Whole HDF5 chunks encoded outside HDF5: the byte shuffle and deflate filters, in numpy and zlib.

The writer compresses whole chunks itself and hands the bytes to HDF5 with
``write_direct_chunk``. HDF5 then stores them as if its own filter pipeline had made them, and
every reader decodes them with the filters the dataset declares. Doing the work here means it
runs on worker threads that do not hold h5py's global lock, so reading the logs and relabelling
go on while a chunk is compressed.

The encoding follows the dataset's declared pipeline, shuffle then deflate:

* shuffle (HDF5's ``H5Z_FILTER_SHUFFLE``): the k-th bytes of all elements first, then all the
  (k+1)-th bytes, and so on, for elements of the dtype's item size;
* deflate (``H5Z_FILTER_DEFLATE``): a zlib stream at the dataset's level, the format of zlib's
  ``compress2``, made by libdeflate (the ``deflate`` package: about twice zlib's speed at the
  same level, and it releases the GIL). Its bytes differ from zlib's own, but any zlib inflate
  (HDF5's filter included) decodes them, and the same input always gives the same bytes.
"""

from __future__ import annotations

import zlib

import deflate
import numpy as np

#: gzip level of every compressed dataset (see goalkit.write.writer).
GZIP_LEVEL = 4


def shuffle_bytes(chunk: np.ndarray) -> bytes:
    """The chunk's bytes in HDF5's shuffled order (element size = the dtype's item size).

    Examples
    --------
    >>> shuffle_bytes(np.array([1, 2], dtype="<u2"))
    b'\\x01\\x02\\x00\\x00'
    """
    chunk = np.ascontiguousarray(chunk)
    size = chunk.dtype.itemsize
    raw = chunk.reshape(-1).view(np.uint8)
    if size == 1:
        return raw.tobytes()
    return raw.reshape(-1, size).T.tobytes()


def gzip_chunk(chunk: np.ndarray, level: int = GZIP_LEVEL) -> bytes:
    """The stored bytes of one whole chunk under HDF5's shuffle + deflate filters."""
    return deflate.zlib_compress(shuffle_bytes(chunk), level)


def unshuffle_bytes(raw: bytes, dtype, shape) -> np.ndarray:
    """Undo :func:`shuffle_bytes`: the elements of ``shape`` and ``dtype`` from shuffled bytes.

    Examples
    --------
    >>> unshuffle_bytes(b'\\x01\\x02\\x00\\x00', "<u2", (2,)).tolist()
    [1, 2]
    """
    dtype = np.dtype(dtype)
    size = dtype.itemsize
    flat = np.frombuffer(raw, dtype=np.uint8)
    if size > 1:
        flat = flat.reshape(size, -1).T.copy()
    return flat.view(dtype).reshape(shape)


def gunzip_chunk(stored: bytes, dtype, shape) -> np.ndarray:
    """Decode one whole chunk stored under HDF5's shuffle + deflate filters (inverse of :func:`gzip_chunk`).

    ``shape`` is the dataset's chunk shape: HDF5 stores the edge chunk of a dataset at full size.
    zlib releases the GIL while it inflates, so several chunks decode in parallel on threads.
    """
    return unshuffle_bytes(zlib.decompress(stored), dtype, shape)
