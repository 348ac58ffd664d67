"""Shards of a scaled-out build: which episodes each holds, and the shard files themselves.

A shard is a run of consecutive kept episodes (cut by :func:`~goalkit.logs.episodes.chunk_bounds`
over episode lengths, by output rows). A worker relabels one shard and writes its rows, exactly as
:func:`~goalkit.pipeline.chunk.relabel_chunk` returned them (no cast), to one uncompressed file
of raw arrays::

    magic        8 bytes  b"GKSHARD2"
    length       8 bytes  little-endian length of the header
    sha256      32 bytes  SHA-256 of the length field, the header and everything after it
    header               UTF-8 JSON: format, format_version, build_key, index, start, stop,
                         first_episode, last_episode, transitions, rows, columns, per_transition,
                         and ``arrays``: [name, dtype, shape, offset, bytes] of each array
                         (offsets from the end of the header, which is padded with spaces)
    arrays               C-order bytes of each array, each at a multiple of 64 bytes from the
                         start of the file (zero bytes between them)

The arrays are, per split (train, validation): ``SPLIT/keys`` (int64 row keys), ``SPLIT/counts``
(rows per transition) and each column, as ``SPLIT/NAME`` or, when its rows repeat per transition,
once per transition as ``SPLIT/NAME@transition``.

One SHA-256 covers the whole file but its magic and the digest's own bytes, and is checked before
anything in the file is believed: a shard read back is exactly what its worker wrote, or it is
refused. Reading is one read of the file into one buffer; the arrays are views of it (no copy,
no second checksum), and a column stored once per transition can be handed on as a deferred
gather (:class:`~goalkit.write.gather.RowGather`) for the writer to copy once.

Plain file writes, so a full disk or a size limit surfaces as one OSError (an HDF5 file with
many datasets can fail repeatedly while its metadata cache is flushed on close). A shard is
written under a temporary name in the same folder and renamed, so a shard file that exists is
complete unless the disk lied; the checksum catches that.
"""

from __future__ import annotations

import hashlib
import json
import os
import struct
import sys
import threading
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from goalkit.errors import GoalkitError
from goalkit.logs.episodes import chunk_bounds
from goalkit.outputs import write_own_file
from goalkit.pipeline.chunk import ChunkRows
from goalkit.pipeline.plan import SLOT_SPAN
from goalkit.write.format import SPLITS
from goalkit.write.gather import RowGather

SHARD_FORMAT = "goalkit-shard"
SHARD_FORMAT_VERSION = 2
#: The first bytes of a shard file.
MAGIC = b"GKSHARD2"
#: Arrays start at multiples of this many bytes from the start of the file.
ALIGN = 64
#: Columns a reader may get as deferred gathers (the wide ones; the summary reads none of them).
DEFERRABLE = ("observation", "action", "next_observation", "reached_goal")
_PREFIX = struct.Struct("<8sQ32s")


class ShardError(GoalkitError):
    """A shard could not be computed, written or read back; names the shard and its episodes."""


@dataclass(frozen=True)
class ShardSpec:
    """One shard: kept-episode positions ``start .. stop - 1``.

    Attributes
    ----------
    index : int
        Position of the shard in the build (the order rows are assembled in).
    start, stop : int
        Positions among the kept episodes (what :meth:`LogSource.read` takes).
    first_episode, last_episode : int
        Episode ids (positions in the whole log) of its first and last episode.
    transitions : int
        Transitions it holds.
    """

    index: int
    start: int
    stop: int
    first_episode: int
    last_episode: int
    transitions: int

    @property
    def name(self) -> str:
        """File name of the shard inside the build folder."""
        return f"shard-{self.index:05d}.npz"

    def describe(self) -> str:
        """``"shard 3 (episodes 120..179)"``, for messages."""
        return f"shard {self.index} (episodes {self.first_episode}..{self.last_episode})"


#: A tapered partition cuts the episodes of its last two shards into this many shards.
TAPER = 4


def plan_shards(plan, transitions_per_shard: int, taper: bool = False) -> list[ShardSpec]:
    """Cut the plan's kept episodes into shards of at most ``transitions_per_shard`` transitions.

    Parameters
    ----------
    plan : BuildPlan
    transitions_per_shard : int
        Upper bound per shard; an episode longer than this is a shard of its own.
    taper : bool
        Cut the episodes of the last two shards again, into at most :data:`TAPER` shards of
        about equal size (a sharded build: the coordinator writes the
        last shard's rows after its worker is done, alone, so a short last shard ends the
        build sooner; a log smaller than one shard is then shared by several workers).

    Returns
    -------
    list of ShardSpec
        Consecutive, covering every kept episode exactly once, in order.

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> p = SimpleNamespace(lengths=np.array([3, 3, 3, 10]), episode_ids=np.array([0, 1, 2, 4]))
    >>> [(s.start, s.stop, s.last_episode) for s in plan_shards(p, 6)]
    [(0, 2, 1), (2, 3, 2), (3, 4, 4)]
    """
    lengths = np.asarray(plan.lengths, dtype=np.int64)
    ids = np.asarray(plan.episode_ids, dtype=np.int64)
    per = max(1, int(transitions_per_shard))
    bounds = chunk_bounds(lengths, per)
    if taper:
        # the episodes of the last two shards (one full, one the remainder), cut again finer
        cut = bounds[-2][0] if len(bounds) > 1 else 0
        finer = [(a + cut, b + cut) for a, b in _even(lengths[cut:], TAPER)]
        bounds = bounds[:-2] + [(a + c, b + c) for a0, b0 in finer   # never above `per` (memory)
                                for c in (a0,) for a, b in chunk_bounds(lengths[a0:b0], per)]
    out = []
    for i, (a, b) in enumerate(bounds):
        out.append(ShardSpec(index=i, start=a, stop=b, first_episode=int(ids[a]), last_episode=int(ids[b - 1]),
                             transitions=int(lengths[a:b].sum())))
    return out


def _even(lengths, parts: int) -> list[tuple[int, int]]:
    """Consecutive runs of whole episodes, at most ``parts``, of about equal transitions.

    Examples
    --------
    >>> _even(np.array([5, 5, 5, 5, 1]), 4)
    [(0, 1), (1, 2), (2, 3), (3, 5)]
    """
    cs = np.cumsum(lengths)
    if not len(cs):
        return []
    # an episode goes to the part its middle transition falls in
    ends = np.searchsorted(cs - np.asarray(lengths) / 2, cs[-1] * np.arange(1, parts + 1) / parts, side="left")
    bounds, start = [], 0
    for e in np.minimum(ends, len(cs)).tolist():
        if e > start:
            bounds.append((start, e))
            start = e
    return bounds


#: Suffix of a column stored once per transition (with ``SPLIT/counts``: rows per transition).
PER_TRANSITION = "@transition"


def _once(col, starts, counts):
    """``col``'s rows once per transition when repeating them gives back exactly its rows, else None.

    A deferred gather repeats per transition when its row index does (checked on the index, one
    integer per row, without gathering the rows); an array when its bytes do.
    """
    if isinstance(col, RowGather):
        first = col.index[starts]
        if np.array_equal(np.repeat(first, counts), col.index):
            return np.take(col.source, first, axis=0)
        return None
    col = np.ascontiguousarray(col)
    flat = col.reshape(len(col), -1).view(np.uint8)
    # most columns that do not repeat (goal, strategy, reward, ...) already differ within the
    # first transition with several rows: no need to build and compare the repeated column
    multi = np.flatnonzero(counts > 1)
    if len(multi):
        a = starts[multi[0]]
        rows = flat[a:a + counts[multi[0]]]
        if not (rows == rows[:1]).all():
            return None
    once = np.ascontiguousarray(col[starts])
    short = once.reshape(len(once), -1).view(np.uint8)
    return once if np.array_equal(np.repeat(short, counts, axis=0), flat) else None


def _pack_split(split, keys, columns, column_order) -> dict:
    """Arrays of one split; a column whose rows repeat per transition is stored once per transition.

    Rows are in key order, and every goal slot of a transition repeats its observation, action,
    next observation, reached goal and task reward; those columns are stored once per transition
    (about half the bytes with five goals per transition). A column is packed only when
    repeating the packed values gives back exactly its bytes, so nothing depends on which
    columns repeat.
    """
    keys = np.ascontiguousarray(keys)
    out = {f"{split}/keys": keys}
    tid = keys // SLOT_SPAN
    starts = np.flatnonzero(np.r_[True, tid[1:] != tid[:-1]]) if len(tid) else np.zeros(0, np.int64)
    counts = np.diff(np.r_[starts, len(tid)]).astype(np.int64)
    packed = len(starts) < len(tid)
    if packed:
        out[f"{split}/counts"] = counts
    for name in column_order:
        col = columns[name]
        once = _once(col, starts, counts) if packed else None
        if once is not None:
            out[f"{split}/{name}{PER_TRANSITION}"] = np.ascontiguousarray(once)
        else:
            out[f"{split}/{name}"] = np.ascontiguousarray(np.asarray(col))
    return out


def _unpack_split(arrays, split, column_order, defer):
    keys = arrays[f"{split}/keys"]
    counts = arrays.get(f"{split}/counts")
    per_row = None
    cols = {}
    for name in column_order:
        once = arrays.get(f"{split}/{name}{PER_TRANSITION}")
        if once is None:
            cols[name] = arrays[f"{split}/{name}"]
        elif defer and name in DEFERRABLE:
            if per_row is None:
                per_row = np.repeat(np.arange(len(counts), dtype=np.int64), counts)
            cols[name] = RowGather(once, per_row)
        else:
            cols[name] = np.repeat(once, counts, axis=0)
    return keys, cols


def _pad(offset: int) -> int:
    return -offset % ALIGN


def write_shard(folder, spec: ShardSpec, build_key: str, rows, column_order, path=None) -> dict:
    """Write one shard's rows to ``folder / spec.name`` (temporary name, then rename).

    Parameters
    ----------
    folder : Path
        The build folder.
    spec : ShardSpec
    build_key : str
        Key of the build (see :func:`goalkit.pipeline.buildfolder.build_key`).
    rows : ChunkRows
        What :func:`~goalkit.pipeline.chunk.relabel_chunk` returned for the shard (its columns
        may be deferred gathers).
    column_order : list of str
        The plan's column names.
    path : Path, optional
        Write here instead of ``folder / spec.name`` (a work folder's unit file).

    Returns
    -------
    dict
        ``{"index", "rows", "sha256", "bytes"}`` (the file's SHA-256, see the module notes, and
        its size).

    Raises
    ------
    OSError
        When the file cannot be written (disk full, no permission); the temporary file is removed.
    OutputError
        When something that is not a file (a link, a folder) is at the shard's name.
    """
    path = Path(folder) / spec.name if path is None else Path(path)
    counts = {s: int(len(rows.keys[s])) if s in rows.keys else 0 for s in SPLITS}
    arrays = {}
    for split in SPLITS:
        if split in rows.keys:
            arrays.update(_pack_split(split, rows.keys[split], rows.columns[split], column_order))
    table, offset = [], 0
    for name, arr in arrays.items():
        offset += _pad(offset)
        table.append([name, arr.dtype.str, list(arr.shape), offset, int(arr.nbytes)])
        offset += arr.nbytes
    meta = {"format": SHARD_FORMAT, "format_version": SHARD_FORMAT_VERSION, "build_key": build_key,
            "index": spec.index, "start": spec.start, "stop": spec.stop, "first_episode": spec.first_episode,
            "last_episode": spec.last_episode, "transitions": spec.transitions, "rows": counts,
            "columns": list(column_order), "arrays": table,
            "per_transition": sorted(k for k in arrays if k.endswith(PER_TRANSITION))}
    header = json.dumps(meta, sort_keys=True).encode()
    header += b" " * _pad(_PREFIX.size + len(header))        # the arrays start aligned
    length = struct.pack("<Q", len(header))
    pieces = [header]
    at = 0
    for (_, _, _, off, _), arr in zip(table, arrays.values()):
        if off > at:
            pieces.append(bytes(off - at))
        pieces.append(memoryview(arr).cast("B") if arr.nbytes else b"")
        at = off + arr.nbytes
    h = hashlib.sha256(length)
    for piece in pieces:
        h.update(piece)
    digest = h.digest()

    def write(f):
        f.write(MAGIC + length + digest)
        for piece in pieces:
            f.write(piece)

    write_own_file(path, write, what="shard file")
    size = _PREFIX.size + sum(len(piece) for piece in pieces)
    return {"index": spec.index, "rows": counts, "sha256": digest.hex(), "bytes": size}


class ReadBuffers:
    """Byte buffers for reading shard files back, each used again once nothing refers to it.

    A shard's arrays are views of the one buffer its file is read into (:func:`read_shard`), and
    they live until the writer has copied them into its blocks, which may be after the next
    shard is read. A fresh buffer per shard has the kernel fault in and zero every page of it
    again (130 MB per 200k-transition build of the demo recipe; on the 2-core machine the
    benchmarks run on, a third of a second of the coordinator's system time). So the sharded
    producer keeps up to ``keep`` buffers and hands out again one no array refers to any more
    (its reference count back to the pool's own), the smallest that is large enough.
    Thread-safe (the next shard is read on a side thread).
    """

    def __init__(self, keep: int = 4):
        self.keep = keep
        self.buffers: list = []
        self.lock = threading.Lock()

    def _free(self, i: int) -> bool:
        # a buffer no array refers to: referenced by this list and getrefcount's argument only
        return sys.getrefcount(self.buffers[i]) == 2

    def take(self, size: int) -> np.ndarray:
        """A uint8 buffer of at least ``size`` bytes that nothing else refers to."""
        with self.lock:
            fits = [i for i in range(len(self.buffers)) if self.buffers[i].size >= size and self._free(i)]
            if fits:
                return self.buffers[min(fits, key=lambda i: self.buffers[i].size)]
            buf = np.empty(-(-size // _BUFFER_ROUND) * _BUFFER_ROUND, np.uint8)
            if len(self.buffers) >= self.keep:
                idle = [i for i in range(len(self.buffers)) if self._free(i)]
                if not idle:
                    return buf            # every kept buffer is in use: this one is not kept
                del self.buffers[min(idle, key=lambda i: self.buffers[i].size)]
            self.buffers.append(buf)
            return buf


#: Shard read buffers are allocated in multiples of this, so that shards of nearly the same size
#: can use each other's buffers.
_BUFFER_ROUND = 1 << 20


def _load(path, written=None, buffers: ReadBuffers | None = None):
    """``(meta, arrays)`` of a shard file whose checksum holds; ShardError-free: raises ValueError.

    ``written``: ``(sha256 hex, bytes)`` its worker reported for a shard computed in this run;
    the file must then carry that digest and have that size, and its bytes are not hashed again
    (see :func:`read_shard`). ``buffers``: read into one of these (:class:`ReadBuffers`) instead
    of a new buffer.
    """
    with open(path, "rb") as f:
        size = os.fstat(f.fileno()).st_size
        if size < _PREFIX.size:
            raise ValueError("shorter than a shard file's first bytes")
        buf = np.empty(size, np.uint8) if buffers is None else buffers.take(size)
        with memoryview(buf) as whole, whole[:size] as target:
            if f.readinto(target) != size:
                raise ValueError("the file changed while being read")
    magic, length, digest = _PREFIX.unpack_from(buf)
    if magic != MAGIC:
        raise ValueError("not a goalkit shard file (or one of another version)")
    view = memoryview(buf)[:size]
    if written is not None:
        if digest.hex() != written[0] or size != written[1]:
            raise ShardChecksumError("not the file its worker wrote (another SHA-256 or size)")
    else:
        h = hashlib.sha256(view[8:16])
        h.update(view[_PREFIX.size:])
        if h.digest() != digest:
            raise ShardChecksumError("its bytes do not match the shard's SHA-256")
    if length > size - _PREFIX.size:
        raise ValueError("header longer than the file")
    meta = json.loads(bytes(view[_PREFIX.size:_PREFIX.size + length]).decode())
    data = _PREFIX.size + length
    arrays = {}
    for name, dtype, shape, offset, nbytes in meta["arrays"]:
        dt = np.dtype(dtype)
        count = int(np.prod(shape, dtype=np.int64))
        if dt.hasobject or count * dt.itemsize != nbytes or offset < 0 or data + offset + nbytes > size:
            raise ValueError(f"array {name} does not fit the file")
        arrays[name] = np.frombuffer(buf, dt, count, data + offset).reshape(shape)
    return meta, arrays


class ShardChecksumError(ValueError):
    """A shard file's bytes do not match its SHA-256."""


def shard_meta(path) -> dict:
    """The header record of a shard file (its checksum checked)."""
    return _load(path)[0]


def read_shard(folder, spec: ShardSpec, build_key: str, column_order, path=None, defer: bool = False,
               written=None, buffers: ReadBuffers | None = None):
    """Read one shard back and check it belongs to this build and matches its checksum.

    ``path`` reads that file instead of ``folder / spec.name`` (a work folder's unit file). With
    ``defer``, the columns of :data:`DEFERRABLE` stored once per transition come back as
    :class:`~goalkit.write.gather.RowGather` (for a writer that gathers them into its blocks).

    ``written`` is ``(sha256 hex, bytes)`` as :func:`write_shard` returned them to the worker that
    wrote the file in this very run, on this host (its task outcome): the file must carry that
    SHA-256 in its header and have that size, and its bytes are not hashed a second time. A
    shard reused from an earlier run (or reported from another host) is read without it: its
    whole SHA-256 is checked. Docs: docs/scaling.md, "How a sharded build runs".

    ``buffers`` (:class:`ReadBuffers`): the file is read into one of them, used again for a later
    shard once none of the returned arrays is referred to any more.

    Returns
    -------
    ChunkRows

    Raises
    ------
    ShardError
        When the file is missing, unreadable, from another build or another partition, or its
        bytes do not match its checksum.
    """
    path = Path(folder) / spec.name if path is None else Path(path)
    try:
        meta, arrays = _load(path, written, buffers)
        expect = {"format": SHARD_FORMAT, "format_version": SHARD_FORMAT_VERSION, "build_key": build_key,
                  "index": spec.index, "start": spec.start, "stop": spec.stop, "transitions": spec.transitions,
                  "columns": list(column_order)}
        for k, v in expect.items():
            if meta.get(k) != v:
                raise ShardError(f"{spec.describe()}: {k} is {meta.get(k)!r}, expected {v!r}", file=path)
        cols, keys = {}, {}
        for split in SPLITS:
            if meta["rows"].get(split):
                keys[split], cols[split] = _unpack_split(arrays, split, column_order, defer)
                if len(keys[split]) != meta["rows"][split]:
                    raise ValueError(f"{split} holds {len(keys[split])} rows, its header says {meta['rows'][split]}")
    except ShardError:
        raise
    except ShardChecksumError:
        raise ShardError(f"{spec.describe()}: rows do not match the shard's SHA-256", file=path) from None
    except (OSError, KeyError, TypeError, ValueError, EOFError) as exc:
        raise ShardError(f"{spec.describe()}: unreadable shard file ({exc})", file=path) from None
    return ChunkRows(cols, keys)


def check_shard(folder, spec: ShardSpec, build_key: str, column_order) -> bool:
    """True when the shard file exists and :func:`read_shard` accepts it."""
    if not (Path(folder) / spec.name).is_file():
        return False
    try:
        read_shard(folder, spec, build_key, column_order)
    except ShardError:
        return False
    return True
