"""One small interface over "a place holding named arrays": an HDF5 group or a .npz file.

Readers ask for shapes and dtypes first (cheap: metadata only) and read rows by slice later.
Key names in messages are the full path of the dataset inside the file.
"""

from __future__ import annotations

import h5py
import numpy as np

from goalkit.errors import LogError
from goalkit.logs.npzfile import NpzArrays


_MEMORY_TYPES: dict = {}


def memory_type(dtype: np.dtype):
    """The HDF5 memory type of a numeric numpy dtype, made once per dtype.

    h5py builds it anew on every read otherwise, which is a quarter of the cost of reading the
    many small datasets of logs with one group per episode.
    """
    found = _MEMORY_TYPES.get(dtype)
    if found is None:
        found = _MEMORY_TYPES[dtype] = h5py.h5t.py_create(dtype)
    return found


class H5Access:
    """Arrays inside one HDF5 group (``group`` is an open ``h5py.Group``).

    Dataset metadata is looked up once per key through h5py's low-level API (opening a
    dataset through the high-level one costs several times more, which matters for logs with
    many thousands of episode groups).
    """

    def __init__(self, group, file):
        self.group = group
        self.file = str(file)
        self.prefix = group.name.strip("/")
        self._info = {}

    def where(self, key: str) -> str:
        """The key's full path inside the file, for messages."""
        return f"{self.prefix}/{key}" if self.prefix else key

    def names(self) -> list[str]:
        """Names of the datasets directly in the group (for messages)."""
        return sorted(k for k, v in self.group.items() if isinstance(v, h5py.Dataset))

    def _lookup(self, key: str):
        if key not in self._info:
            try:
                dsid = h5py.h5d.open(self.group.id, key.encode("utf-8"))
                self._info[key] = (dsid, tuple(int(n) for n in dsid.shape), dsid.dtype)
            except KeyError:                 # missing, or not a dataset
                self._info[key] = None
            except (ValueError, OSError, TypeError) as exc:
                raise LogError(f"cannot open dataset, the file may be corrupt ({exc})",
                               file=self.file, key=self.where(key)) from None
        return self._info[key]

    def has(self, key: str) -> bool:
        """True when ``key`` is a dataset of the group."""
        return self._lookup(key) is not None

    def _require(self, key):
        info = self._lookup(key)
        if info is None:
            raise LogError("cannot open dataset: missing, not a dataset, or the file is corrupt",
                           file=self.file, key=self.where(key))
        return info

    def shape(self, key: str) -> tuple:
        """Shape of dataset ``key``."""
        return self._require(key)[1]

    def dtype(self, key: str) -> np.dtype:
        """Dtype of dataset ``key``."""
        return self._require(key)[2]

    def read(self, key: str, start=None, stop=None) -> np.ndarray:
        """Rows ``start:stop`` (default all) of dataset ``key``."""
        dsid, shape, dtype = self._require(key)
        try:
            if shape == ():
                return np.asarray(self.group[key][()])
            n = shape[0]
            a = 0 if start is None else max(0, min(int(start), n))
            b = n if stop is None else max(a, min(int(stop), n))
            if (a, b) == (0, n) and dtype.kind in "biuf":
                out = np.empty(shape, dtype=dtype)
                if out.size:
                    dsid.read(h5py.h5s.ALL, h5py.h5s.ALL, out, mtype=memory_type(dtype))
                return out
            return self.group[key][a:b]
        except (OSError, ValueError, TypeError, KeyError) as exc:
            raise LogError(f"cannot read dataset, the file may be truncated or corrupt ({exc})",
                           file=self.file, key=self.where(key)) from None

    def attr(self, key: str):
        """Attribute ``key`` of the group, or None."""
        try:
            return self.group.attrs[key] if key in self.group.attrs else None
        except (OSError, TypeError):
            return None


class NpzAccess:
    """Arrays of one .npz file."""

    def __init__(self, arrays: NpzArrays):
        self.arrays = arrays
        self.file = arrays.path

    def where(self, key: str) -> str:
        """The key as named in messages (array names are used as they are)."""
        return key

    def names(self) -> list[str]:
        """Names of the arrays (for messages)."""
        return sorted(self.arrays.keys())

    def has(self, key: str) -> bool:
        """True when the file holds array ``key``."""
        return key in self.arrays

    def shape(self, key: str) -> tuple:
        """Shape of array ``key``."""
        return self.arrays.shape(key)

    def dtype(self, key: str) -> np.dtype:
        """Dtype of array ``key``."""
        return self.arrays.dtype(key)

    def read(self, key: str, start=None, stop=None) -> np.ndarray:
        """Rows ``start:stop`` (default all) of array ``key``."""
        return self.arrays.read(key, start, stop)

    def attr(self, key: str):
        """Always None: .npz files have no attributes."""
        return None


def open_h5(path):
    """Open ``path`` read-only with h5py, turning every failure into a one-line LogError."""
    import os

    path = str(path)
    if not os.path.exists(path):
        raise LogError("file not found", file=path)
    if os.path.isdir(path):
        raise LogError("expected an HDF5 file, got a directory", file=path)
    try:
        if not h5py.is_hdf5(path):
            raise LogError("not an HDF5 file (no HDF5 signature); expected an .h5 file", file=path)
        return h5py.File(path, "r")
    except LogError:
        raise
    except OSError as exc:
        raise LogError(f"cannot open as HDF5, the file may be truncated or corrupt ({exc})",
                       file=path) from None
