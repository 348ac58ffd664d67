"""Writing a goal-conditioned set: chunk-aligned, order-canonical, checksummed, atomic.

Rows arrive in (source_episode, source_step, slot) order, a chunk of episodes at a time, and
go to one of two splits. To make the file byte-identical whatever the processing chunk size,
the writer only ever writes whole HDF5 chunks of ``chunk_rows`` rows, and writes the blocks that
a batch of rows completes in the order of their last row's key. Every split's columns are
written together, in a fixed column order, and each column's SHA-256 is updated block by block.
The file is written under an exclusive temporary name in the output's folder and published
at the end (:mod:`goalkit.outputs`): an existing output is replaced only when asked for, and
only if it is a goalkit set.
"""

from __future__ import annotations

import hashlib
import json
import os
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

from goalkit.errors import DatasetError
from goalkit.outputs import discard, open_hdf5, publish, refuse_existing
from goalkit.relabel.strategies import strategy_names
from goalkit.write.format import (FORMAT_NAME, FORMAT_VERSION, SPLITS, STRATEGY_CODES_ATTR, is_goal_set,
                                  strategy_codes_text)
from goalkit.write.chunkcodec import GZIP_LEVEL, gzip_chunk
from goalkit.write.gather import RowGather
from goalkit.write.seal import write_seal

#: Threads compressing whole chunks of gzip sets.
ENCODE_THREADS = 2


class OutputWriteError(DatasetError):
    """The dataset file could not be written (disk full, no permission, file size limit).

    Attributes
    ----------
    reason : str
        The operating system's reason, on one line.
    advice : str or None
        What the user can do or what was kept, appended after ``"; "``.
    """

    def __init__(self, reason: str, *, file, advice: str | None = None):
        self.reason = reason
        self.advice = advice
        tail = f"; {advice}" if advice else ""
        super().__init__(f"cannot write the dataset ({reason}){tail}", file=file)


def os_reason(exc: BaseException) -> str:
    """The OS's reason for a failed write, on one line (HDF5 wraps it in a longer message)."""
    import re

    if isinstance(exc, OSError) and exc.errno:
        return os.strerror(exc.errno)
    text = " ".join(str(exc).split())
    found = re.search(r"error message = '([^']+)'", text)
    return found.group(1) if found else text


class _SplitBlocks:
    """One split's rows on their way to the file: queued parts and two reused block buffers.

    Rows are copied from the queued parts into a preallocated block of ``rows`` rows; a full
    block is written and hashed while the other buffer fills. Reusing the buffers keeps the
    writer's memory fixed however long the build runs.
    """

    def __init__(self, columns: dict, rows: int):
        self.columns = columns
        self.rows = rows
        self.parts: deque = deque()   # (columns dict, keys) queued since the last flush
        self.queued = 0
        self.bufs = [None, None]
        self.waits = [[], []]          # hash futures still reading each buffer
        self.cur = 0
        self.fill = 0
        self.last_key = -1

    def buffer(self) -> dict:
        if self.bufs[self.cur] is None:
            self.bufs[self.cur] = {n: np.empty((self.rows, *shape), dtype=dtype)
                                   for n, (dtype, shape) in self.columns.items()}
        for f in self.waits[self.cur]:
            f.result()
        self.waits[self.cur] = []
        return self.bufs[self.cur]

    def completions(self) -> list[tuple[int, int]]:
        """(key, queued rows consumed) at each point where the queued rows complete a block."""
        if not self.queued:
            return []
        keys = np.concatenate([k for _, k in self.parts]) if len(self.parts) > 1 else self.parts[0][1]
        ends = np.arange(self.rows - self.fill, self.queued + 1, self.rows)
        return [(int(keys[e - 1]), int(e)) for e in ends]

    def consume(self, count: int) -> None:
        """Copy the next ``count`` queued rows into the current buffer (it must have room)."""
        buf = self.buffer()
        while count:
            cols, keys = self.parts[0]
            m = min(count, len(keys))
            for n in self.columns:
                col = cols[n]
                if isinstance(col, RowGather):  # gathered straight into the block
                    col[:m].into(buf[n][self.fill:self.fill + m])
                else:
                    buf[n][self.fill:self.fill + m] = col[:m]
            self.last_key = int(keys[m - 1])
            self.fill += m
            count -= m
            self.queued -= m
            if m == len(keys):
                self.parts.popleft()
            else:
                self.parts[0] = ({n: v[m:] for n, v in cols.items()}, keys[m:])

    def direct(self, count: int, dtypes: dict):
        """The next ``count`` queued rows as views, without a copy, when they lie in one queued
        part of the stored dtypes and the current buffer is empty; else None."""
        if self.fill or not self.parts or len(self.parts[0][1]) < count:
            return None
        cols, keys = self.parts[0]
        if any(isinstance(cols[n], RowGather) or cols[n].dtype != dtypes[n] or not cols[n].flags.c_contiguous
               for n in self.columns):
            return None
        block = {n: cols[n][:count] for n in self.columns}
        self.last_key = int(keys[count - 1])
        self.queued -= count
        if count == len(keys):
            self.parts.popleft()
        else:
            self.parts[0] = ({n: v[count:] for n, v in cols.items()}, keys[count:])
        return block

    def take(self) -> dict:
        """Hand over the filled part of the current buffer and switch to the other buffer."""
        block = {n: v[:self.fill] for n, v in self.bufs[self.cur].items()}
        self.cur, self.fill = 1 - self.cur, 0
        return block


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
    compression : {"gzip", "none", "lzf"}
        Compression filter of every column. ``"lzf"`` only writes a set as earlier versions
        did (tests of reading them): HDF5's LZF filter does not give the same bytes for the same
        rows, so recipes refuse it (:data:`goalkit.pipeline.recipe.STORED_ONLY_COMPRESSIONS`).
    total_rows : dict of str to int, optional
        Rows each split will hold, when known: the datasets are then created at their final
        size instead of grown block by block (faster; the count is checked at :meth:`close`).
    replace : bool
        Replace an existing goalkit set at ``path`` (anything else there is never replaced).

    Notes
    -----
    Use as a context manager; an exception inside the block removes the temporary file.
    Rows passed to :meth:`add` must come in increasing ``keys`` order across calls.
    """

    def __init__(self, path, columns: dict, chunk_rows: int = 65536, compression: str = "gzip",
                 total_rows: dict | None = None, replace: bool = False):
        self.path = Path(path)
        self.columns = columns
        self.chunk_rows = int(chunk_rows)
        self.replace = bool(replace)
        if not self.path.parent.is_dir():
            raise DatasetError("the output folder does not exist", file=self.path.parent)
        refuse_existing(self.path, replace=self.replace, ours=is_goal_set, what="dataset")
        # whole chunks are written once and never read back: no chunk cache (it only grows)
        self.tmp, self.file = open_hdf5(self.path, libver="earliest", rdcc_nbytes=0)
        self._encoder = None
        try:
            self._setup(columns, compression, total_rows)
        except BaseException:
            # not yet a context manager's object: an error (or Ctrl-C) here must remove the file
            self.abort()
            raise

    def _setup(self, columns: dict, compression: str, total_rows) -> None:
        """Everything after the temporary file exists: threads, buffers and the datasets."""
        self.hashes = {s: {n: hashlib.sha256() for n in columns} for s in SPLITS}
        # Checksums are updated on one background thread (hashlib releases the GIL), in the
        # order blocks are written, so hashing overlaps with relabelling and HDF5 writes.
        self._hasher = ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-sha256")
        self.rows = {s: 0 for s in SPLITS}
        self.total_rows = {s: int((total_rows or {}).get(s, 0)) for s in SPLITS}
        self.blocks = {s: _SplitBlocks(columns, self.chunk_rows) for s in SPLITS}
        self._dtypes = {n: np.dtype(dtype) for n, (dtype, _) in columns.items()}
        self._view_hashes: deque = deque()
        filt = {"gzip": dict(compression="gzip", compression_opts=GZIP_LEVEL, shuffle=True),
                "lzf": dict(compression="lzf", shuffle=True), "none": {}}[compression]
        # Whole chunks bypass HDF5's selection and filter machinery (H5Dwrite_chunk): without
        # filters their stored bytes are the rows' bytes; with gzip they are shuffled and
        # deflated here (goalkit.write.chunkcodec), on threads that do not hold h5py's lock.
        self.compression = compression
        self._encoder = (ThreadPoolExecutor(max_workers=ENCODE_THREADS, thread_name_prefix="goalkit-gzip")
                         if compression == "gzip" else None)
        self.datasets = {}
        self._chunk_len = {}   # rows per HDF5 chunk of each dataset (asking h5py costs a call)
        for s in SPLITS:
            group = self.file.create_group(s)
            for name, (dtype, shape) in columns.items():
                n = (total_rows or {}).get(s, 0)
                if n:  # sized up front: no resizing on the write path
                    self.datasets[s, name] = group.create_dataset(
                        name, shape=(n, *shape), dtype=dtype, chunks=(min(self.chunk_rows, n), *shape),
                        track_times=False, **filt)
                else:
                    self.datasets[s, name] = group.create_dataset(
                        name, shape=(0, *shape), maxshape=(None, *shape), dtype=dtype,
                        chunks=(self.chunk_rows, *shape), track_times=False, **filt)
                self._chunk_len[s, name] = self.datasets[s, name].chunks[0]

    # ---- writing ---------------------------------------------------------------------
    def add(self, split: str, columns: dict, keys: np.ndarray) -> None:
        """Queue rows for ``split``; ``keys`` (int64, increasing) order all rows of the build.

        A column is an array or a :class:`~goalkit.write.gather.RowGather` (rows gathered
        straight into the block buffers). Nothing is copied until :meth:`flush`; do not change
        the arrays before it.
        """
        if len(keys):
            missing = set(self.columns) - set(columns)
            if missing:
                raise ValueError(f"missing columns: {sorted(missing)}")
            sb = self.blocks[split]
            sb.parts.append((columns, np.asarray(keys, dtype=np.int64)))
            sb.queued += len(keys)

    def flush(self, final: bool = False) -> None:
        """Write every block the queued rows complete, in the order of their last row's key.

        With ``final``, also write the partly filled blocks (the end of each split).
        """
        events = []
        for s in SPLITS:
            events += [(key, SPLITS.index(s), upto) for key, upto in self.blocks[s].completions()]
        events.sort()
        consumed = {s: 0 for s in SPLITS}
        for _, si, upto in events:
            s = SPLITS[si]
            block = self.blocks[s].direct(upto - consumed[s], self._dtypes)
            if block is not None:  # the block lies inside one queued array: write it as it is
                self._write_rows(s, block, None)
            else:
                self.blocks[s].consume(upto - consumed[s])
                self._write_block(s)
            consumed[s] = upto
        for s in SPLITS:
            sb = self.blocks[s]
            if sb.queued:
                sb.consume(sb.queued)
        if final:
            tails = sorted((self.blocks[s].last_key, SPLITS.index(s)) for s in SPLITS if self.blocks[s].fill)
            for _, si in tails:
                self._write_block(SPLITS[si])

    def _write_block(self, split: str) -> None:
        sb = self.blocks[split]
        used = sb.cur
        self._write_rows(split, sb.take(), used)

    def _write_rows(self, split: str, block: dict, buffer_index) -> None:
        """Write one block; ``buffer_index`` is the split buffer it lives in (None: a view)."""
        sb = self.blocks[split]
        n = len(next(iter(block.values())))
        a = self.rows[split]
        futures = []
        # a whole chunk goes to HDF5 as its stored bytes: raw, or gzip-encoded on the encoder threads
        whole = {}
        if self.compression != "lzf":
            whole = {name: np.ascontiguousarray(block[name], dtype=self._dtypes[name]) for name in self.columns
                     if n == self._chunk_len[split, name] and a % n == 0}
            if self.total_rows[split] and a + n == self.total_rows[split]:
                for name in self.columns:        # the split's last chunk, short: stored padded
                    size = self._chunk_len[split, name]
                    if n < size and a % size == 0:
                        whole[name] = _padded(block[name], size, self._dtypes[name])
        if self._encoder is not None:
            whole = {name: self._encoder.submit(gzip_chunk, data) for name, data in whole.items()}
        for name in self.columns:
            ds = self.datasets[split, name]
            try:
                if not self.total_rows[split]:
                    ds.resize(a + n, axis=0)
                elif a + n > self.total_rows[split]:
                    raise ValueError(f"{split}: more rows than the {self.total_rows[split]} announced")
                if name in whole:
                    data = whole[name]
                    ds.id.write_direct_chunk((a,) + (0,) * len(self.columns[name][1]),
                                             data.result() if self._encoder is not None else data)
                else:  # a partial chunk (the end of a split), or lzf: through HDF5's pipeline
                    ds[a:a + n] = block[name]
            except OSError as exc:
                raise OutputWriteError(os_reason(exc), file=self.path) from None
            futures.append(self._hasher.submit(self.hashes[split][name].update, block[name]))
        if buffer_index is not None:
            sb.waits[buffer_index] = futures  # the buffer is refilled only after these hashes read it
        else:  # views keep their arrays alive until hashed: bound how many wait
            self._view_hashes.append(futures)
            while len(self._view_hashes) > 2:
                for f in self._view_hashes.popleft():
                    f.result()
        self.rows[split] = a + n

    # ---- finishing -------------------------------------------------------------------
    def _finish_hashing(self) -> None:
        if self._encoder is not None:
            self._encoder.shutdown(wait=True)
        self._hasher.shutdown(wait=True)
        for futures in self._view_hashes:
            for f in futures:
                f.result()
        for sb in self.blocks.values():
            for f in sb.waits[0] + sb.waits[1]:
                f.result()

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
        for s in SPLITS:
            if self.total_rows[s] and self.rows[s] != self.total_rows[s]:
                raise ValueError(f"{s}: {self.rows[s]} rows written, {self.total_rows[s]} announced")
        root = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, **attrs,
                "manifest": self.manifest()}
        try:
            for key in sorted(root):
                self.file.attrs[key] = _attr(root[key])
            codes = strategy_codes_text(strategy_names())
            for s in SPLITS:
                self.file[s].attrs["rows"] = self.rows[s]
                for key, value in sorted((split_attrs or {}).get(s, {}).items()):
                    self.file[s].attrs[key] = _attr(value)
                if "strategy" in self.file[s]:  # the set describes its own strategy codes
                    self.file[s]["strategy"].attrs[STRATEGY_CODES_ATTR] = codes
            write_seal(self.file)  # last: covers every attribute above and the datasets' layout
            self.file.close()
        except (OSError, RuntimeError) as exc:  # HDF5 reports a failed final flush as RuntimeError
            raise OutputWriteError(os_reason(exc), file=self.path) from None
        return publish(self.tmp, self.path, replace=self.replace, ours=is_goal_set, what="dataset")

    def abort(self) -> None:
        """Close and remove the temporary file."""
        try:
            for pool in (self._encoder, getattr(self, "_hasher", None)):   # (either may not exist yet)
                if pool is not None:
                    pool.shutdown(wait=True, cancel_futures=True)
            self.file.close()
        except (OSError, RuntimeError):
            pass  # a file whose writes failed may not close cleanly; it is removed below either way
        finally:
            discard(self.tmp)

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None:
            self.abort()
        return False


def _padded(rows, size: int, dtype) -> np.ndarray:
    """``rows`` followed by zero rows up to ``size``: the bytes HDF5 stores for a dataset's short
    last chunk (a chunk is stored whole; the rows past the end hold the fill value, 0)."""
    out = np.zeros((size, *np.shape(rows)[1:]), dtype=dtype)
    out[:len(rows)] = rows
    return out


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
