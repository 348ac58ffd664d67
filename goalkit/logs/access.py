"""One small interface over "a place holding named arrays": an HDF5 group or a .npz file.

Readers ask for shapes and dtypes first (cheap: metadata only) and read rows by slice later.
Key names in messages are the full path of the dataset inside the file.
"""

from __future__ import annotations

import numpy as np

from goalkit.errors import LogError
from goalkit.logs.npzfile import NpzArrays


class H5Access:
    """Arrays inside one HDF5 group (``group`` is an open ``h5py.Group``)."""

    def __init__(self, group, file):
        self.group = group
        self.file = str(file)
        self.prefix = group.name.strip("/")

    def where(self, key: str) -> str:
        """The key's full path inside the file, for messages."""
        return f"{self.prefix}/{key}" if self.prefix else key

    def names(self) -> list[str]:
        """Names of the datasets directly in the group (for messages)."""
        import h5py

        return sorted(k for k, v in self.group.items() if isinstance(v, h5py.Dataset))

    def has(self, key: str) -> bool:
        import h5py

        try:
            return isinstance(self.group.get(key), h5py.Dataset)
        except (KeyError, ValueError, OSError):
            return False

    def _ds(self, key):
        try:
            return self.group[key]
        except (KeyError, OSError) as exc:
            raise LogError(f"cannot read dataset ({exc})", file=self.file, key=self.where(key)) from None

    def shape(self, key: str) -> tuple:
        return tuple(self._ds(key).shape)

    def dtype(self, key: str) -> np.dtype:
        return self._ds(key).dtype

    def read(self, key: str, start=None, stop=None) -> np.ndarray:
        """Rows ``start:stop`` (default all) of dataset ``key``."""
        ds = self._ds(key)
        try:
            if ds.shape == ():
                return np.asarray(ds[()])
            if start is None and stop is None:
                return ds[...]
            return ds[slice(start, stop)]
        except (OSError, ValueError, TypeError) as exc:
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
        return key

    def names(self) -> list[str]:
        return sorted(self.arrays.keys())

    def has(self, key: str) -> bool:
        return key in self.arrays

    def shape(self, key: str) -> tuple:
        return self.arrays.shape(key)

    def dtype(self, key: str) -> np.dtype:
        return self.arrays.dtype(key)

    def read(self, key: str, start=None, stop=None) -> np.ndarray:
        return self.arrays.read(key, start, stop)

    def attr(self, key: str):
        return None


def open_h5(path):
    """Open ``path`` read-only with h5py, turning every failure into a one-line LogError."""
    import os

    import h5py

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
