"""Reading a built set: open it, read a split, iterate batches, check the manifest."""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Iterator

import h5py
import numpy as np

from goalkit.errors import DatasetError
from goalkit.write.chunkread import SplitColumns
from goalkit.write.epochs import EpochSpec, iter_batches
from goalkit.write.format import MATERIAL_COLUMNS, SPLITS, open_set_file
from goalkit.write.resolve import locate_logs, open_logs_of, resolve_rows
from goalkit.write.seal import read_attrs, split_group, split_rows


class GoalSet:
    """A built goal-conditioned set, opened read-only.

    Parameters
    ----------
    path : str or Path
        A file written by ``goalkit build``.
    logs_root : str or Path, optional
        Indexed sets: the folder that now holds the logs the set was built from, when they moved
        (standing for the logs' common folder at build time). The logs are looked for beside the
        set first (a set moved together with its logs needs nothing), then at their recorded
        paths, then under ``logs_root`` by their place and by size and SHA-256; a file whose
        checksum differs is refused (docs/dataset.md, "Moving a set and its logs").

    Attributes
    ----------
    mode : str
        ``"materialised"`` or ``"indexed"``.
    seed : int
    recipe : str
        The recipe text the set was built from.
    provenance, summary, manifest : dict

    Examples
    --------
    >>> with GoalSet("gantry-goals.h5") as gs:                      # doctest: +SKIP
    ...     for batch in gs.batches("train", 256, shuffle=True, seed=1):
    ...         obs, goal, reward = batch["observation"], batch["goal"], batch["reward"]
    """

    def __init__(self, path, logs_root=None):
        self.path = Path(path)
        self.logs_root = logs_root
        self.file = open_set_file(self.path)
        try:
            self.stored = read_attrs(self.file, self.path)
        except DatasetError:
            self.file.close()
            raise
        self.mode = self.stored.mode
        self.seed = self.stored.seed
        self.recipe = self.stored.recipe
        self.provenance = self.stored.provenance
        self.summary = self.stored.summary
        self.manifest = self.stored.manifest
        self._logs = None
        self._relocation = None

    # ---- context manager -------------------------------------------------------------
    def close(self) -> None:
        """Close the file."""
        self.file.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    # ---- reading ---------------------------------------------------------------------
    def _group(self, split: str):
        if split not in SPLITS:
            raise DatasetError(f"unknown split {split!r}; splits are {', '.join(SPLITS)}", file=self.path)
        return split_group(self.file, split, self.path)

    def rows(self, split: str = "train") -> int:
        """Number of rows in ``split``."""
        return split_rows(self.file, split, self.path)

    def columns(self, split: str = "train") -> list[str]:
        """Column names stored in ``split`` (writing order)."""
        return [k for k in self.manifest_columns() if k in self._group(split)]

    def manifest_columns(self) -> list[str]:
        seen = []
        for key in self.manifest:
            name = key.split("/", 1)[1]
            if name not in seen:
                seen.append(name)
        return seen

    def read(self, split: str = "train", columns=None, start: int = 0, stop: int | None = None,
             resolve: bool = True) -> dict:
        """Read rows ``start .. stop - 1`` of ``split``.

        Parameters
        ----------
        split : {"train", "validation"}
        columns : list of str, optional
            Columns to read (default: all stored, plus the materialised ones in indexed mode).
        start, stop : int
            Row range.
        resolve : bool
            In an indexed set, fetch observation, action, next_observation and reached_goal
            from the source logs.

        Returns
        -------
        dict of str to ndarray
        """
        group = self._group(split)
        stop = self.rows(split) if stop is None else min(stop, self.rows(split))
        stored = self.columns(split)
        want = list(columns) if columns is not None else stored + (
            list(MATERIAL_COLUMNS) if self.mode == "indexed" and resolve else [])
        out = {}
        rows = self.rows(split)
        for name in want:
            if name in stored:
                ds = group[name]
                if not isinstance(ds, h5py.Dataset) or ds.ndim < 1 or ds.shape[0] != rows:
                    raise DatasetError(f"expected a column of {rows} rows (the split's rows attribute), found "
                                       f"{getattr(ds, 'shape', 'a group')}", file=self.path, key=f"{split}/{name}")
                out[name] = ds[start:stop]
            elif name in MATERIAL_COLUMNS and self.mode == "indexed" and resolve:
                continue
            else:
                raise DatasetError(f"no column {name!r} in split {split}; columns: {', '.join(stored)}",
                                   file=self.path, key=name)
        missing = [n for n in want if n not in out]
        if missing:
            out.update(self._resolve(group, start, stop, missing))
        return out

    def source_files(self) -> list[Path]:
        """Where the files this set was built from are now (logs, embedding, goal library).

        Looked for beside the set, at their recorded paths, then under ``logs_root``; each
        file's size and SHA-256 are checked once per process (docs/dataset.md).

        Raises
        ------
        DatasetError
            A file found nowhere, or one whose checksum differs from the recorded one.
        """
        if self._relocation is None:
            self._relocation = locate_logs(self, self.logs_root)
        return [Path(p) for p in self._relocation.found.values()]

    def _resolve(self, group, start, stop, names) -> dict:
        if self._logs is None:
            self.source_files()
            self._logs = open_logs_of(self, relocation=self._relocation)
        ep = group["source_episode"][start:stop]
        step = group["source_step"][start:stop]
        return resolve_rows(self._logs, ep, step, names)

    def batches(self, split: str = "train", batch_size: int = 256, columns=None, shuffle=False,
                seed: int = 0, drop_last: bool = False, *, epoch: int = 0, memory_budget: int | None = None,
                shard: tuple[int, int] = (0, 1), remainder: str = "drop", row_numbers: bool = False
                ) -> Iterator[dict]:
        """Iterate over one epoch of ``split`` in batches; every row once (docs/dataset.md).

        Parameters
        ----------
        split : {"train", "validation"}
        batch_size : int
        columns : list of str, optional
            Columns to read (default: all, as :meth:`read`).
        shuffle : bool or {"auto", "full", "pooled"}
            ``False``: storage order. ``True`` / ``"auto"``: a permutation of the whole split
            (``"full"``) when this shard's rows fit in ``memory_budget``, otherwise pools of mirrored pairs
            of stored chunks (``"pooled"``); see :mod:`goalkit.write.epochs`.
        seed, epoch : int
            The order is a pure function of (seed, epoch, shard).
        drop_last : bool
            Leave out the last batch when it is short.
        memory_budget : int, optional
            Bytes of decoded rows held at once (default 2 GiB, ``epochs.DEFAULT_MEMORY_BUDGET``).
        shard : (int, int)
            ``(index, count)``: read only this shard of the epoch (data-loader workers times
            processes; ``goalkit.write.epochs.shard_index``). Shards are disjoint and equal.
        remainder : {"drop", "pad"}
            The ``rows % count`` rows left after equal shards: left out of the epoch, or padded
            by repeating rows from the start of the epoch's order.
        row_numbers : bool
            Add ``"row"``, each row's number in the split.

        Yields
        ------
        dict of str to ndarray
        """
        if batch_size < 1:
            raise DatasetError(f"batch_size must be at least 1, got {batch_size}", file=self.path)
        try:
            index, count = (int(v) for v in shard)
        except (TypeError, ValueError):
            raise DatasetError(f"shard must be (index, count), got {shard!r}", file=self.path) from None
        spec = EpochSpec(self.rows(split), seed=seed, epoch=epoch, index=index, count=count, remainder=remainder)
        reader = SplitColumns(self, split, columns)
        try:
            yield from iter_batches(reader, spec, batch_size, shuffle, memory_budget, drop_last, row_numbers)
        finally:
            reader.close()

    # ---- checking --------------------------------------------------------------------
    def check_manifest(self, block_rows: int = 1 << 18) -> list[str]:
        """Recompute every column's SHA-256; return a message per mismatch (empty: all match)."""
        return ManifestCheck(self, block_rows).problems()


class ManifestCheck:
    """Every column's SHA-256 against the manifest, fed rows as a caller reads them.

    :meth:`add` hashes rows read elsewhere (each column's rows in order from row 0, so verify
    decodes a column once for its rows and its checksum); :meth:`problems` reads and hashes
    whatever rows were not fed and returns a message per mismatch, in manifest order.
    """

    def __init__(self, goal_set: GoalSet, block_rows: int = 1 << 18):
        self.goal_set, self.block_rows = goal_set, int(block_rows)
        self._hash, self._done, self._unreadable = {}, {}, set()
        for key in goal_set.manifest:
            split, name = key.split("/", 1)
            if name in goal_set.file[split]:
                self._hash[key], self._done[key] = hashlib.sha256(), 0

    def add(self, split: str, start: int, columns: dict) -> None:
        """Hash ``columns`` (name -> rows ``start ..``) where they continue what was hashed."""
        for name, value in columns.items():
            key = f"{split}/{name}"
            if self._done.get(key) == start:
                self._hash[key].update(np.ascontiguousarray(value))   # the bytes, not copied
                self._done[key] = start + len(value)

    def unreadable(self, split: str, names) -> None:
        """Columns with a stored chunk that cannot be read (reported by the caller): their
        checksums are not computed, and :meth:`problems` says nothing of them."""
        self._unreadable.update(f"{split}/{name}" for name in names)

    def problems(self) -> list[str]:
        """A message per column whose SHA-256 differs from the manifest's (or that is missing)."""
        problems = []
        for key, expected in self.goal_set.manifest.items():
            if key not in self._hash:
                problems.append(f"{key}: column listed in the manifest is missing")
                continue
            if key in self._unreadable:
                continue
            split, name = key.split("/", 1)
            ds, h = self.goal_set.file[split][name], self._hash[key]
            try:
                for a in range(self._done[key], ds.shape[0], self.block_rows):
                    h.update(np.ascontiguousarray(ds[a:a + self.block_rows]).tobytes())
            except OSError:   # a stored chunk that does not decompress
                problems.append(f"{key}: rows from {a} cannot be read (a stored chunk does not decompress); "
                                f"checksum not computed")
                continue
            self._done[key] = ds.shape[0]
            if h.hexdigest() != expected:
                problems.append(f"{key}: checksum {h.hexdigest()[:16]}... does not match the manifest's "
                                f"{expected[:16]}...")
        return problems


def open_set(path, logs_root=None) -> GoalSet:
    """Open a built set read-only (see :class:`GoalSet`).

    Parameters
    ----------
    path : str or Path
        The set.
    logs_root : str or Path, optional
        Where the logs are now, if they moved (indexed sets read their logs; see :class:`GoalSet`).

    Returns
    -------
    GoalSet
    """
    return GoalSet(path, logs_root=logs_root)
