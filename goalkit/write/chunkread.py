"""Reading row ranges of a built set's columns, each stored chunk decoded once, on threads.

h5py decodes a compressed chunk inside its global lock, so a plain ``ds[a:b]`` uses one core.
Here the stored bytes of each whole chunk are fetched with ``read_direct_chunk`` (cheap, under
the lock) and inflated by zlib on threads (zlib releases the GIL), then copied straight into the
destination rows. Only datasets whose filter pipeline is exactly HDF5's shuffle + deflate (what
the writer declares for ``compression = "gzip"``) take this path; any other dataset, or a chunk
stored with a filter skipped, is read through h5py. Streams are inflated by libdeflate (the
``deflate`` package) when it is installed, else by zlib; both give the same bytes.

A reader made with ``keep_tails=True`` (verify's: it reads consecutive row ranges whose ends
rarely fall on a chunk's end) keeps, per column, the last chunk a read inflated but did not
use to its end; the next read that starts in that chunk copies from it instead of inflating it
again, so each stored chunk is inflated once over a pass through the split.
"""

from __future__ import annotations

import os
import zlib
from concurrent.futures import ThreadPoolExecutor

import h5py
import numpy as np

try:  # libdeflate inflates zlib streams two to three times faster than zlib
    import deflate
except ImportError:  # pragma: no cover - a dependency; zlib gives the same bytes
    deflate = None

from goalkit.errors import DatasetError
from goalkit.write.format import MATERIAL_COLUMNS

#: The filter pipeline decoded here: (filter id, ...) in pipeline order.
_SHUFFLE_DEFLATE = (h5py.h5z.FILTER_SHUFFLE, h5py.h5z.FILTER_DEFLATE)


def _decodable(ds) -> bool:
    plist = ds.id.get_create_plist()
    if plist.get_layout() != h5py.h5d.CHUNKED:
        return False
    filters = tuple(plist.get_filter(i)[0] for i in range(plist.get_nfilters()))
    return filters == _SHUFFLE_DEFLATE and ds.dtype.kind in "biuf" and ds.dtype.isnative


class SplitColumns:
    """Row ranges of some columns of one split, read with every chunk decoded once.

    Parameters
    ----------
    goalset : GoalSet
        An open set.
    split : str
    columns : list of str, optional
        Columns to read (default: all stored, plus the materialised ones of an indexed set).

    threads : int, optional
        Decoding threads (default: up to 4, at most the CPUs).
    keep_tails : bool
        Keep each column's last chunk read only in part for the next read (see the module).

    Attributes
    ----------
    rows : int
        Rows in the split.
    chunk_rows : int
        Rows per stored chunk (of the first stored column read; the writer uses one length).
    """

    def __init__(self, goalset, split: str, columns=None, threads: int | None = None, keep_tails: bool = False):
        self.goalset = goalset
        self.split = split
        self.group = goalset._group(split)
        self.rows = goalset.rows(split)
        stored = goalset.columns(split)
        indexed = goalset.mode == "indexed"
        want = list(columns) if columns is not None else stored + (list(MATERIAL_COLUMNS) if indexed else [])
        self.stored, self.resolved = [], []
        for name in want:
            if name in stored:
                self.stored.append(name)
            elif name in MATERIAL_COLUMNS and indexed:
                self.resolved.append(name)
            else:
                raise DatasetError(f"no column {name!r} in split {split}; columns: {', '.join(stored)}",
                                   file=goalset.path, key=name)
        if not want:
            raise DatasetError("expected at least one column to read", file=goalset.path, key=split)
        self.names = want
        self.datasets = {}
        for name in self.stored:
            ds = self.group[name]
            if not isinstance(ds, h5py.Dataset) or ds.ndim < 1 or ds.shape[0] != self.rows:
                raise DatasetError(f"expected a column of {self.rows} rows (the split's rows attribute), found "
                                   f"{getattr(ds, 'shape', 'a group')}", file=goalset.path, key=f"{split}/{name}")
            self.datasets[name] = ds
        self._fast = {name: _decodable(ds) for name, ds in self.datasets.items()}
        first = self.datasets[self.stored[0]] if self.stored else None
        self.chunk_rows = int(first.chunks[0]) if first is not None and first.chunks else max(1, self.rows)
        self._threads = threads or min(4, os.cpu_count() or 1)
        self._pool = None
        self._pool_pid = None
        self._resolved_bytes = None
        self._keep_tails = bool(keep_tails)
        self._tails = {}   # column -> (chunk start, the job inflating it): a chunk read only in part

    # ---- sizes -------------------------------------------------------------------------
    def row_bytes(self) -> int:
        """Bytes one row of the requested columns takes in memory (resolved columns measured on one row)."""
        total = sum(ds.dtype.itemsize * int(np.prod(ds.shape[1:], dtype=np.int64)) for ds in self.datasets.values())
        if self.resolved and self.rows:
            if self._resolved_bytes is None:
                one = self.goalset._resolve(self.group, 0, 1, self.resolved)
                self._resolved_bytes = sum(v[:1].nbytes for v in one.values())
            total += self._resolved_bytes
        return max(1, int(total))

    # ---- reading -----------------------------------------------------------------------
    def _executor(self):
        # a pool made before a fork (data-loader workers) has no threads in the child: make one per process
        if self._pool is None or self._pool_pid != os.getpid():
            self._pool = ThreadPoolExecutor(self._threads)
            self._pool_pid = os.getpid()
            self._tails = {}
        return self._pool

    def read_ranges(self, ranges) -> dict:
        """Rows of the ranges ``[(a, b), ...]`` (in that order), concatenated, as dict of arrays."""
        return self.finish(self.start(ranges))

    def start(self, ranges):
        """Begin reading (chunks decode on threads meanwhile); :meth:`finish` returns the arrays."""
        ranges = [(int(a), int(b)) for a, b in ranges if b > a]
        total = sum(b - a for a, b in ranges)
        out = {}
        jobs = []
        for name, ds in self.datasets.items():
            dest = np.empty((total, *ds.shape[1:]), dtype=ds.dtype)
            out[name] = dest
            if self._fast[name]:
                jobs += self._chunk_jobs(ds, dest, ranges, name)
                continue
            at = 0
            for a, b in ranges:
                ds.read_direct(dest, np.s_[a:b], np.s_[at:at + b - a])
                at += b - a
        return ranges, out, jobs

    def finish(self, started) -> dict:
        """The arrays of a :meth:`start`, once every chunk is decoded."""
        ranges, out, jobs = started
        for job in jobs:
            job.result()
        if self.resolved:
            parts = [self.goalset._resolve(self.group, a, b, self.resolved) for a, b in ranges]
            for name in self.resolved:
                out[name] = (np.concatenate([p[name] for p in parts]) if len(parts) != 1 else parts[0][name]) \
                    if parts else np.zeros((0,))
        return {name: out[name] for name in self.names}

    def read(self, start: int, stop: int) -> dict:
        """Rows ``start .. stop - 1``."""
        return self.read_ranges([(start, min(stop, self.rows))])

    def _chunk_jobs(self, ds, dest, ranges, name=None) -> list:
        """One job per stored chunk the ranges touch: the chunk inflated once, copied to every
        place the ranges put its rows (several ranges may share a chunk)."""
        n = int(ds.chunks[0])
        tail = ds.shape[1:]
        per_row = int(np.prod(tail, dtype=np.int64))
        size = ds.dtype.itemsize
        spans = {}  # chunk start -> [(destination rows, first row, end row)]
        at = 0
        for a, b in ranges:
            for c0 in range(a - a % n, b, n):
                lo, hi = max(a, c0), min(b, c0 + n)
                spans.setdefault(c0, []).append((np.s_[at + lo - a:at + hi - a], lo, hi))
            at += b - a
        jobs = []
        pool = self._executor()
        kept = self._tails.get(name) if self._keep_tails else None
        for c0, parts in spans.items():
            targets = [(dest[rows], (lo - c0) * per_row, (hi - c0) * per_row) for rows, lo, hi in parts]
            if kept is not None and kept[0] == c0:   # inflated by an earlier read: copied from it
                jobs.append(pool.submit(_copy_from, kept[1], targets, size, n * per_row))
                continue
            mask, stored = ds.id.read_direct_chunk((c0,) + (0,) * len(tail))
            if mask:  # a filter was skipped for this chunk: let HDF5 decode it
                for rows, lo, hi in parts:
                    ds.read_direct(dest, np.s_[lo:hi], rows)
                continue
            # a chunk this read leaves rows of: kept (its inflated bytes) for the next read
            keep = self._keep_tails and max(hi for _, _, hi in parts) < min(c0 + n, self.rows)
            job = pool.submit(_inflate_into, stored, targets, size, n * per_row, keep)
            jobs.append(job)
            if keep:
                self._tails[name] = (c0, job)
        return jobs

    def close(self) -> None:
        """Stop the decoding threads."""
        if self._pool is not None and self._pool_pid == os.getpid():
            self._pool.shutdown(wait=True)
        self._pool = None
        self._tails = {}


def _inflate_into(stored: bytes, targets, size: int, elements: int, keep: bool = False):
    """Inflate one chunk and copy elements ``e0 .. e1 - 1`` into each ``(target, e0, e1)``;
    with ``keep``, the inflated bytes are returned (a later read copies other rows from them)."""
    raw = np.frombuffer(_inflate(stored, elements * size), dtype=np.uint8)
    if raw.size != elements * size:
        raise DatasetError(f"a stored chunk inflates to {raw.size} bytes, expected {elements * size}")
    _scatter(raw, targets, size, elements)
    return raw if keep else None


def _copy_from(job, targets, size: int, elements: int) -> None:
    """Copy rows of a chunk an earlier job inflated (its failure, if it failed, is raised here).

    The earlier job was handed to the pool first, so a thread runs it (or ran it) already.
    """
    _scatter(job.result(), targets, size, elements)


def _scatter(raw, targets, size: int, elements: int) -> None:
    for target, e0, e1 in targets:
        flat = target.reshape(-1).view(np.uint8)
        if size == 1:
            flat[:] = raw[e0:e1]
        else:   # HDF5's shuffle undone one byte plane at a time (2-6x faster than a transposed copy)
            rows, planes = flat.reshape(-1, size), raw.reshape(size, elements)
            for k in range(size):
                rows[:, k] = planes[k, e0:e1]


def _inflate(stored: bytes, size: int):
    if deflate is not None:
        try:
            return deflate.zlib_decompress(stored, size)
        except deflate.DeflateError as exc:
            raise DatasetError(f"a stored chunk does not inflate to {size} bytes ({exc})") from None
    return zlib.decompress(stored)
