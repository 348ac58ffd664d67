"""Writing a goal-conditioned set: chunk-aligned, order-canonical, checksummed, atomic.

Rows arrive in (source_episode, source_step, slot) order, a chunk of episodes at a time, and
go to one of two splits. To make the file byte-identical whatever the processing chunk size,
the writer only ever writes whole HDF5 chunks of ``chunk_rows`` rows, and writes the blocks that
a batch of rows completes in the order of their last row's key. Every split's columns are
written together, in a fixed column order, and each column's SHA-256 is updated block by block.
The file is written under a temporary name in the output's folder and renamed at the end.
"""

from __future__ import annotations

import hashlib
import json
import os
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import h5py
import numpy as np

from goalkit.errors import DatasetError
from goalkit.write.format import FORMAT_NAME, FORMAT_VERSION, SPLITS


def temporary_path(path: Path) -> Path:
    """A temporary sibling of ``path`` (same folder, so the final rename is atomic)."""
    return path.with_name(f".{path.name}.partial-{os.getpid()}")


class _SplitBuffer:
    """Rows queued for one split, as a list of parts; blocks are cut without copying when a
    block lies inside one part."""

    def __init__(self, names):
        self.names = names
        self.parts: list[tuple[dict, np.ndarray]] = []
        self.pending = 0

    def add(self, columns: dict, keys: np.ndarray):
        self.parts.append(({n: columns[n] for n in self.names}, keys))
        self.pending += len(keys)

    def _cut(self, rows: int):
        """Remove and return the first ``rows`` queued rows as (columns, keys)."""
        pieces, need = [], rows
        while need:
            cols, keys = self.parts[0]
            n = len(keys)
            if n <= need:
                pieces.append((cols, keys))
                self.parts.pop(0)
                need -= n
            else:
                pieces.append(({k: v[:need] for k, v in cols.items()}, keys[:need]))
                self.parts[0] = ({k: v[need:] for k, v in cols.items()}, keys[need:])
                need = 0
        self.pending -= rows
        if len(pieces) == 1:
            return pieces[0]
        return ({k: np.concatenate([p[0][k] for p in pieces]) for k in self.names},
                np.concatenate([p[1] for p in pieces]))

    def take_blocks(self, rows: int, final: bool):
        """Cut complete blocks of ``rows`` rows (and the remainder when ``final``)."""
        blocks = []
        while self.pending >= rows or (final and self.pending):
            cols, keys = self._cut(min(rows, self.pending))
            blocks.append((int(keys[-1]), cols))
        return blocks


class SetWriter:
    """Write the rows of a goal-conditioned set into one HDF5 file.

    Parameters
    ----------
    path : Path
        Final output path; nothing appears there until :meth:`close` succeeds.
    columns : dict of str to (numpy.dtype, tuple)
        Column name -> (dtype, per-row shape), in writing order.
    chunk_rows : int
        Rows per HDF5 chunk and per write.
    compression : {"gzip", "lzf", "none"}
        Compression filter of every column.

    Notes
    -----
    Use as a context manager; an exception inside the block removes the temporary file.
    Rows passed to :meth:`add` must come in increasing ``keys`` order across calls.
    """

    def __init__(self, path, columns: dict, chunk_rows: int = 65536, compression: str = "gzip"):
        self.path = Path(path)
        self.columns = columns
        self.chunk_rows = int(chunk_rows)
        self.tmp = temporary_path(self.path)
        if not self.path.parent.is_dir():
            raise DatasetError("the output folder does not exist", file=self.path.parent)
        try:
            self.file = h5py.File(self.tmp, "w", libver="earliest")
        except OSError as exc:
            raise DatasetError(f"cannot create the output file ({exc})", file=self.tmp) from None
        self.hashes = {s: {n: hashlib.sha256() for n in columns} for s in SPLITS}
        # Checksums are updated on one background thread (hashlib releases the GIL), in the
        # order blocks are written, so hashing overlaps with relabelling and HDF5 writes.
        self._hasher = ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-sha256")
        self._pending_hash = None
        self.rows = {s: 0 for s in SPLITS}
        self.buffers = {s: _SplitBuffer(list(columns)) for s in SPLITS}
        filt = {"gzip": dict(compression="gzip", compression_opts=4, shuffle=True),
                "lzf": dict(compression="lzf", shuffle=True), "none": {}}[compression]
        self.datasets = {}
        for s in SPLITS:
            group = self.file.create_group(s)
            for name, (dtype, shape) in columns.items():
                self.datasets[s, name] = group.create_dataset(
                    name, shape=(0, *shape), maxshape=(None, *shape), dtype=dtype,
                    chunks=(self.chunk_rows, *shape), track_times=False, **filt)

    # ---- writing ---------------------------------------------------------------------
    def add(self, split: str, columns: dict, keys: np.ndarray) -> None:
        """Queue rows for ``split``; ``keys`` (int64, increasing) order all rows of the build."""
        if len(keys):
            self.buffers[split].add(columns, np.asarray(keys, dtype=np.int64))

    def flush(self, final: bool = False) -> None:
        """Write every complete block, in the order of their last row's key."""
        blocks = []
        for s in SPLITS:
            blocks += [(key, s, cols) for key, cols in self.buffers[s].take_blocks(self.chunk_rows, final)]
        blocks.sort(key=lambda b: (b[0], SPLITS.index(b[1])))
        for _, s, cols in blocks:
            self._write_block(s, cols)

    def _write_block(self, split: str, cols: dict) -> None:
        n = len(next(iter(cols.values())))
        a = self.rows[split]
        for name, (dtype, shape) in self.columns.items():
            data = np.ascontiguousarray(cols[name], dtype=dtype)
            if data.shape != (n, *shape):
                raise ValueError(f"column {name}: shape {data.shape}, expected {(n, *shape)}")
            ds = self.datasets[split, name]
            ds.resize(a + n, axis=0)
            ds[a:a + n] = data
            self._pending_hash = self._hasher.submit(self.hashes[split][name].update, data)
        self.rows[split] = a + n

    # ---- finishing -------------------------------------------------------------------
    def _finish_hashing(self) -> None:
        self._hasher.shutdown(wait=True)
        if self._pending_hash is not None:
            self._pending_hash.result()

    def manifest(self) -> dict:
        """SHA-256 of every column's bytes, keyed ``"split/column"``."""
        self._finish_hashing()
        return {f"{s}/{n}": self.hashes[s][n].hexdigest() for s in SPLITS for n in self.columns}

    def close(self, attrs: dict, split_attrs: dict | None = None) -> Path:
        """Write the remaining rows and the attributes, then rename to the final path.

        Parameters
        ----------
        attrs : dict
            Root attributes; dict and list values are stored as JSON text.
        split_attrs : dict, optional
            split name -> attributes of that group.
        """
        self.flush(final=True)
        root = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, **attrs,
                "manifest": self.manifest()}
        for key in sorted(root):
            self.file.attrs[key] = _attr(root[key])
        for s in SPLITS:
            self.file[s].attrs["rows"] = self.rows[s]
            for key, value in sorted((split_attrs or {}).get(s, {}).items()):
                self.file[s].attrs[key] = _attr(value)
        self.file.close()
        os.replace(self.tmp, self.path)
        return self.path

    def abort(self) -> None:
        """Close and remove the temporary file."""
        try:
            self._hasher.shutdown(wait=True, cancel_futures=True)
            self.file.close()
        finally:
            self.tmp.unlink(missing_ok=True)

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None:
            self.abort()
        return False


def _attr(value):
    if isinstance(value, (dict, list, tuple)):
        return json.dumps(value, sort_keys=True, default=_json_default)
    return value


def _json_default(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(type(obj).__name__)
