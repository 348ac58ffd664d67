"""Shards of a scaled-out build: which episodes each holds, and the shard files themselves.

A shard is a run of consecutive kept episodes (cut by :func:`~goalkit.logs.episodes.chunk_bounds`
over episode lengths, by output rows). A worker relabels one shard and writes its rows, exactly as
:func:`~goalkit.pipeline.chunk.relabel_chunk` returned them (no cast), to one uncompressed
``.npz`` file (a zip of ``.npy`` arrays)::

    train/keys, train/<column> ...        row keys (int64) and columns of the train rows
    train/<column>@transition             a column stored once per transition (repeated on read
    train/counts                          by the rows of each transition, ``counts``)
    validation/...                        the same for the validation rows
    meta                                  UTF-8 JSON: format, build_key, index, start, stop,
                                          first_episode, last_episode, transitions, rows, columns,
                                          per_transition, sha256

Plain file writes, so a full disk or a size limit surfaces as one OSError (an HDF5 file with
many datasets can fail repeatedly while its metadata cache is flushed on close).

``sha256`` covers, split by split (train, validation), the keys and then every column in the
plan's column order, each as C-order bytes with a short header (name, dtype, shape). A shard is
written under a temporary name in the same folder and renamed, so a shard file that exists is
complete unless the disk lied; the checksum catches that.
"""

from __future__ import annotations

import hashlib
import json
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from goalkit.errors import GoalkitError
from goalkit.logs.episodes import chunk_bounds
from goalkit.outputs import write_own_file
from goalkit.pipeline.chunk import ChunkRows
from goalkit.pipeline.plan import SLOT_SPAN
from goalkit.write.format import SPLITS

SHARD_FORMAT = "goalkit-shard"
SHARD_FORMAT_VERSION = 1


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


def plan_shards(plan, transitions_per_shard: int) -> list[ShardSpec]:
    """Cut the plan's kept episodes into shards of at most ``transitions_per_shard`` transitions.

    Parameters
    ----------
    plan : BuildPlan
    transitions_per_shard : int
        Upper bound per shard; an episode longer than this is a shard of its own.

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
    out = []
    for i, (a, b) in enumerate(chunk_bounds(lengths, max(1, int(transitions_per_shard)))):
        out.append(ShardSpec(index=i, start=a, stop=b, first_episode=int(ids[a]), last_episode=int(ids[b - 1]),
                             transitions=int(lengths[a:b].sum())))
    return out


def rows_digest(rows, column_order) -> str:
    """SHA-256 of a shard's rows (keys then columns, split by split; see the module notes)."""
    h = hashlib.sha256()
    for split in SPLITS:
        if split not in rows.keys:
            continue
        items = [("keys", rows.keys[split])] + [(n, rows.columns[split][n]) for n in column_order]
        for name, arr in items:
            arr = np.ascontiguousarray(arr)
            h.update(f"{split}/{name}:{arr.dtype.str}:{arr.shape}".encode())
            h.update(arr.tobytes())
    return h.hexdigest()


#: Suffix of a column stored once per transition (with ``SPLIT/counts``: rows per transition).
PER_TRANSITION = "@transition"


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
        col = np.ascontiguousarray(columns[name])
        if packed:
            once = np.ascontiguousarray(col[starts])
            if np.repeat(once, counts, axis=0).tobytes() == col.tobytes():
                out[f"{split}/{name}{PER_TRANSITION}"] = once
                continue
        out[f"{split}/{name}"] = col
    return out


def _unpack_split(z, split, column_order):
    keys = z[f"{split}/keys"]
    counts = z[f"{split}/counts"] if f"{split}/counts" in z.files else None
    cols = {}
    for name in column_order:
        once = f"{split}/{name}{PER_TRANSITION}"
        cols[name] = np.repeat(z[once], counts, axis=0) if once in z.files else z[f"{split}/{name}"]
    return keys, cols


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
        What :func:`~goalkit.pipeline.chunk.relabel_chunk` returned for the shard.
    column_order : list of str
        The plan's column names.
    path : Path, optional
        Write here instead of ``folder / spec.name`` (a work folder's unit file).

    Returns
    -------
    dict
        ``{"index", "rows", "sha256"}``.

    Raises
    ------
    OSError
        When the file cannot be written (disk full, no permission); the temporary file is removed.
    OutputError
        When something that is not a file (a link, a folder) is at the shard's name.
    """
    path = Path(folder) / spec.name if path is None else Path(path)
    digest = rows_digest(rows, column_order)
    counts = {s: int(len(rows.keys[s])) if s in rows.keys else 0 for s in SPLITS}
    meta = {"format": SHARD_FORMAT, "format_version": SHARD_FORMAT_VERSION, "build_key": build_key,
            "index": spec.index, "start": spec.start, "stop": spec.stop, "first_episode": spec.first_episode,
            "last_episode": spec.last_episode, "transitions": spec.transitions, "rows": counts,
            "columns": list(column_order), "sha256": digest}
    arrays = {}
    for split in SPLITS:
        if split in rows.keys:
            arrays.update(_pack_split(split, rows.keys[split], rows.columns[split], column_order))
    meta["per_transition"] = sorted(k for k in arrays if k.endswith(PER_TRANSITION))
    arrays["meta"] = np.frombuffer(json.dumps(meta, sort_keys=True).encode(), dtype=np.uint8)
    write_own_file(path, lambda f: np.savez(f, **arrays), what="shard file")
    return {"index": spec.index, "rows": counts, "sha256": digest}


def shard_meta(path) -> dict:
    """The ``meta`` record of a shard file."""
    with np.load(path, allow_pickle=False) as z:
        return json.loads(z["meta"].tobytes().decode())


def read_shard(folder, spec: ShardSpec, build_key: str, column_order, path=None):
    """Read one shard back and check it belongs to this build and matches its checksum.

    ``path`` reads that file instead of ``folder / spec.name`` (a work folder's unit file).

    Returns
    -------
    ChunkRows

    Raises
    ------
    ShardError
        When the file is missing, unreadable, from another build or another partition, or its
        rows do not match its checksum.
    """
    path = Path(folder) / spec.name if path is None else Path(path)
    try:
        with np.load(path, allow_pickle=False) as z:
            meta = json.loads(z["meta"].tobytes().decode())
            expect = {"format": SHARD_FORMAT, "build_key": build_key, "index": spec.index, "start": spec.start,
                      "stop": spec.stop, "transitions": spec.transitions, "columns": list(column_order)}
            for k, v in expect.items():
                if meta.get(k) != v:
                    raise ShardError(f"{spec.describe()}: {k} is {meta.get(k)!r}, expected {v!r}", file=path)
            cols, keys = {}, {}
            for split in SPLITS:
                if meta["rows"].get(split):
                    keys[split], cols[split] = _unpack_split(z, split, column_order)
    except ShardError:
        raise
    except (OSError, KeyError, ValueError, EOFError, zipfile.BadZipFile) as exc:
        raise ShardError(f"{spec.describe()}: unreadable shard file ({exc})", file=path) from None
    rows = ChunkRows(cols, keys)
    if rows_digest(rows, column_order) != meta.get("sha256"):
        raise ShardError(f"{spec.describe()}: rows do not match the shard's SHA-256", file=path)
    return rows


def check_shard(folder, spec: ShardSpec, build_key: str, column_order) -> bool:
    """True when the shard file exists and :func:`read_shard` accepts it."""
    if not (Path(folder) / spec.name).is_file():
        return False
    try:
        read_shard(folder, spec, build_key, column_order)
    except ShardError:
        return False
    return True
