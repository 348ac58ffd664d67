"""The suite file: one small HDF5 file of held-out (state, goal, horizon, reachable) rows.

Layout (format ``goalkit-goal-suite``, version 1; docs/suites.md)::

    /            attributes: format, format_version, goalkit_version, seed, set_path,
                 set_checksum, logs_checksum, strata (JSON), counts (JSON), columns_checksum
    /<column>    one row per pair, in (episode, step, slot) order (:data:`COLUMNS`)

``set_checksum`` is the source set's seal (or, for a set without one, the SHA-256 of its
manifest text); ``logs_checksum`` the SHA-256 of the source log files' checksums. A suite is
scored only against the set it names. ``columns_checksum`` is the SHA-256 of every column's
bytes in :data:`COLUMNS` order, checked when the suite is opened.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from goalkit import __version__
from goalkit.errors import DatasetError
from goalkit.outputs import discard, open_hdf5, publish, refuse_existing
from goalkit.write.format import open_set_file

FORMAT_NAME = "goalkit-goal-suite"
FORMAT_VERSION = 1

#: Column -> (dtype or None for the set's own dtype, meaning).
COLUMNS = {
    "state": (None, "s_t, the logged observation the goal is to be reached from"),
    "goal": (None, "g, the goal vector"),
    "horizon": ("int64", "steps to the goal: j - t along the own episode, or the joined graph's steps; -1 unreachable"),
    "reachable": ("uint8", "1 when a held-out episode (alone or joined) reaches the goal from the state"),
    "action": (None, "a_t, the logged action at the state"),
    "episode": ("int64", "source episode of the state (the set's episode id)"),
    "step": ("int64", "t"),
    "slot": ("int64", "the set row's goal slot"),
    "route": ("uint8", "0 own episode, 1 stitched (several episodes joined), 2 none"),
    "bucket": ("int16", "horizon bucket index (strata.buckets)"),
    "proximity": ("uint8", "0 near the training goals, 1 far (strata.cut)"),
    "train_distance": ("float32", "Euclidean distance of the goal to the nearest training goal"),
}


def set_checksum(goalset) -> str:
    """The checksum a suite carries of its source set: the seal, or the manifest's SHA-256."""
    seal = goalset.file.attrs.get("seal")
    if seal is not None:
        return seal.decode() if isinstance(seal, bytes) else str(seal)
    manifest = goalset.file.attrs.get("manifest", "")
    manifest = manifest.decode() if isinstance(manifest, bytes) else str(manifest)
    return hashlib.sha256(manifest.encode()).hexdigest()


def logs_checksum(goalset) -> str:
    """SHA-256 of the source log files' recorded checksums (sorted), from the set's provenance."""
    files = goalset.provenance.get("log_files", [])
    text = json.dumps(files, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def columns_checksum(columns: dict) -> str:
    """SHA-256 of the columns' bytes (C order) in :data:`COLUMNS` order."""
    h = hashlib.sha256()
    for name in COLUMNS:
        a = np.ascontiguousarray(columns[name])
        h.update(f"{name}:{a.dtype.str}:{a.shape}".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def is_suite_file(path) -> bool:
    """True when ``path`` is an HDF5 file whose ``format`` attribute is :data:`FORMAT_NAME`."""
    import h5py

    try:
        with h5py.File(path, "r") as f:
            fmt = f.attrs.get("format")
    except (OSError, ValueError):
        return False
    return (fmt.decode() if isinstance(fmt, bytes) else fmt) == FORMAT_NAME


def write_suite(path, columns: dict, attrs: dict, *, replace: bool = False) -> Path:
    """Write a suite file through goalkit's safe outputs (temporary name, no-clobber publish).

    Parameters
    ----------
    path : str or Path
    columns : dict of str to ndarray
        Every column of :data:`COLUMNS`, all of one length.
    attrs : dict
        ``seed``, ``set_path``, ``set_checksum``, ``logs_checksum``, ``strata`` and ``counts``
        (the last two JSON-able).
    replace : bool
        Replace an existing suite file (only a suite file).
    """
    path = Path(path)
    refuse_existing(path, replace=replace, ours=is_suite_file, what="suite file")
    tmp, f = open_hdf5(path, libver="earliest")
    try:
        with f:
            f.attrs["format"] = FORMAT_NAME
            f.attrs["format_version"] = FORMAT_VERSION
            f.attrs["goalkit_version"] = __version__
            f.attrs["seed"] = int(attrs["seed"])
            for key in ("set_path", "set_checksum", "logs_checksum"):
                f.attrs[key] = str(attrs[key])
            for key in ("strata", "counts"):
                f.attrs[key] = json.dumps(attrs[key], sort_keys=True)
            f.attrs["columns_checksum"] = columns_checksum(columns)
            for name in COLUMNS:
                f.create_dataset(name, data=np.ascontiguousarray(columns[name]), track_times=False)
    except BaseException:
        discard(tmp)
        raise
    return publish(tmp, path, replace=replace, ours=is_suite_file, what="suite file")


@dataclass(frozen=True)
class Suite:
    """A suite, read whole (suites are small).

    Attributes
    ----------
    path : Path
    columns : dict of str to ndarray
    seed : int
    set_path, set_checksum, logs_checksum : str
    strata, counts : dict
    """

    path: Path
    columns: dict
    seed: int
    set_path: str
    set_checksum: str
    logs_checksum: str
    strata: dict
    counts: dict

    def __len__(self) -> int:
        return int(self.columns["horizon"].shape[0])


def _attr(f, key, path):
    if key not in f.attrs:
        raise DatasetError(f"expected the suite attribute {key!r}; is this a suite written by goalkit suite?",
                           file=path, key=key)
    v = f.attrs[key]
    return v.decode() if isinstance(v, bytes) else v


def read_suite(path) -> Suite:
    """Read a suite file and check its format and its columns' checksum.

    Raises
    ------
    DatasetError
        One line naming the file (and key): not a suite, a newer version, a missing or edited column.
    """
    path = Path(path)
    f = open_set_file(path)
    with f:
        if _attr(f, "format", path) != FORMAT_NAME:
            raise DatasetError(f"expected a goal suite (format {FORMAT_NAME}), got format {_attr(f, 'format', path)!r}",
                               file=path, key="format")
        version = int(_attr(f, "format_version", path))
        if version > FORMAT_VERSION:
            raise DatasetError(f"suite format version {version} is newer than this goalkit reads ({FORMAT_VERSION})",
                               file=path, key="format_version")
        cols = {}
        for name in COLUMNS:
            if name not in f or not hasattr(f[name], "shape"):
                raise DatasetError("expected this column in a suite", file=path, key=name)
            cols[name] = f[name][()]
        n = cols["horizon"].shape[0]
        for name, a in cols.items():
            if a.ndim < 1 or a.shape[0] != n:
                raise DatasetError(f"expected {n} rows like the horizon column, got shape {a.shape}", file=path, key=name)
        if columns_checksum(cols) != _attr(f, "columns_checksum", path):
            raise DatasetError("the columns do not match the suite's columns_checksum (the file was edited or "
                               "damaged); make the suite again", file=path, key="columns_checksum")
        try:
            strata, counts = json.loads(_attr(f, "strata", path)), json.loads(_attr(f, "counts", path))
        except (TypeError, ValueError):
            raise DatasetError("expected JSON text", file=path, key="strata") from None
        return Suite(path, cols, int(_attr(f, "seed", path)), str(_attr(f, "set_path", path)),
                     str(_attr(f, "set_checksum", path)), str(_attr(f, "logs_checksum", path)), strata, counts)
