"""The stored facts of a built set: typed reading, the structure check and the seal.

Every stored fact a set's meaning depends on is either covered by the seal or re-derived by
verify (:mod:`goalkit.write.verify`):

- the **manifest** holds the SHA-256 of every column's bytes;
- the **seal** (root attribute ``seal``, format version 2) is the SHA-256 of a canonical
  encoding of every attribute of the file (root and split groups, the manifest included, the
  seal excluded) and of every dataset's name, dtype, shape, chunk shape and filter. It catches
  accidental edits, partial copies and tools that rewrite attributes; it does not stop a
  deliberate editor, who can recompute it;
- **re-derivation** (verify) recomputes the rows, the summary, the provenance, the list of
  columns, their dtypes and shapes and the ``rows`` / ``episodes`` attributes from the logs,
  the recipe text and the ``seed`` attribute, so a resealed edit that changes meaning is still
  caught.

Sets of format version 1 carry no seal; they are read and verified by re-derivation alone.

A file that cannot be read as a set (an attribute missing or of the wrong type, JSON or TOML
text that does not parse, a split group missing, a column stored as a link, a column shorter
than its split's ``rows``) raises :class:`~goalkit.errors.DatasetError` naming the file and key.
"""

from __future__ import annotations

import hashlib
import json
import re
from dataclasses import dataclass

import h5py
import numpy as np

from goalkit.errors import DatasetError
from goalkit.write.format import COLUMN_ATTRS, FORMAT_NAME, FORMAT_VERSION, SPLITS, STRATEGY_CODES_ATTR

#: Root attributes of every set, and the one added in format version 2.
ROOT_ATTRS = ("format", "format_version", "goalkit_version", "mode", "seed", "recipe", "provenance",
              "summary", "manifest")
SEAL_ATTR = "seal"
#: Attributes of each split group.
SPLIT_ATTRS = ("rows", "episodes")
MODES = ("materialised", "indexed")
_HEX64 = re.compile(r"[0-9a-f]{64}\Z")


@dataclass(frozen=True)
class StoredAttrs:
    """The root attributes of a set, typed and checked.

    Attributes
    ----------
    version : int
    goalkit_version, mode, recipe : str
    seed : int
    provenance, summary, manifest : dict
    seal : str or None
        None for format version 1.
    """

    version: int
    goalkit_version: str
    mode: str
    seed: int
    recipe: str
    provenance: dict
    summary: dict
    manifest: dict
    seal: str | None


def _get(attrs, key, path, where=""):
    if key not in attrs:
        raise DatasetError(f"attribute missing{where}", file=path, key=key)
    try:
        return attrs[key]
    except (OSError, TypeError, ValueError, KeyError) as exc:
        raise DatasetError(f"attribute unreadable{where} ({exc})", file=path, key=key) from None


def _text(attrs, key, path) -> str:
    value = _get(attrs, key, path)
    if isinstance(value, bytes):
        try:
            value = value.decode("utf-8")
        except UnicodeDecodeError:
            raise DatasetError("expected UTF-8 text", file=path, key=key) from None
    if not isinstance(value, str):
        raise DatasetError(f"expected text, got {type(value).__name__}", file=path, key=key)
    return value


def _whole(value, key, path, where="", low=0, high=2 ** 63 - 1) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise DatasetError(f"expected a whole number{where}, got {type(value).__name__}", file=path, key=key)
    if not low <= int(value) <= high:
        raise DatasetError(f"expected a whole number from {low} to {high}{where}, got {int(value)}",
                           file=path, key=key)
    return int(value)


def _json_object(attrs, key, path) -> dict:
    text = _text(attrs, key, path)
    try:
        value = json.loads(text)
    except ValueError as exc:
        raise DatasetError(f"not valid JSON ({exc})", file=path, key=key) from None
    if not isinstance(value, dict):
        raise DatasetError(f"expected a JSON object, got {type(value).__name__}", file=path, key=key)
    return value


def read_attrs(file: h5py.File, path) -> StoredAttrs:
    """Read and type-check a set's root attributes.

    Raises
    ------
    DatasetError
        Naming the file and the attribute, when one is missing, of the wrong type, not valid JSON,
        or when the file is not a goalkit set of a supported format version.
    """
    attrs = file.attrs
    fmt = _get(attrs, "format", path) if "format" in attrs else None
    if isinstance(fmt, bytes):
        fmt = fmt.decode("utf-8", "replace")
    if fmt != FORMAT_NAME:
        raise DatasetError(f"not a goalkit set: attribute 'format' is {fmt!r}, expected {FORMAT_NAME!r}",
                           file=path, key="format")
    version = _whole(_get(attrs, "format_version", path), "format_version", path)
    if not 1 <= version <= FORMAT_VERSION:
        raise DatasetError(f"format version {version} is not supported by this goalkit "
                           f"(reads version 1 .. {FORMAT_VERSION})", file=path, key="format_version")
    mode = _text(attrs, "mode", path)
    if mode not in MODES:
        raise DatasetError(f"expected one of {', '.join(MODES)}, got {mode!r}", file=path, key="mode")
    manifest = _json_object(attrs, "manifest", path)
    for k, v in manifest.items():
        if not isinstance(v, str) or not _HEX64.match(v) or k.count("/") != 1:
            raise DatasetError(f"entry {k!r}: expected 'split/column' -> a hex SHA-256", file=path, key="manifest")
    seal = _text(attrs, SEAL_ATTR, path) if version >= 2 else None
    return StoredAttrs(version=version, goalkit_version=_text(attrs, "goalkit_version", path), mode=mode,
                       seed=_whole(_get(attrs, "seed", path), "seed", path), recipe=_text(attrs, "recipe", path),
                       provenance=_json_object(attrs, "provenance", path),
                       summary=_json_object(attrs, "summary", path), manifest=manifest, seal=seal)


def split_group(file: h5py.File, split: str, path) -> h5py.Group:
    """The group of ``split``, which must be a plain (hard-linked) group."""
    link = file.get(split, getlink=True)
    if link is None:
        raise DatasetError("split group missing", file=path, key=split)
    if not isinstance(link, h5py.HardLink):
        raise DatasetError(f"expected a group, found a {type(link).__name__}", file=path, key=split)
    group = file[split]
    if not isinstance(group, h5py.Group):
        raise DatasetError("expected a group", file=path, key=split)
    return group


def split_rows(file: h5py.File, split: str, path) -> int:
    """The ``rows`` attribute of a split group (checked)."""
    group = split_group(file, split, path)
    return _whole(_get(group.attrs, "rows", path, f" of group {split}"), f"{split}/rows", path,
                  f" in group {split}")


def stored_strategy_codes(ds: h5py.Dataset, key) -> dict | None:
    """The ``codes`` attribute of a strategy column as {code: name}, None when absent.

    Raises
    ------
    DatasetError
        When the attribute is not JSON text of an object mapping codes 0 .. 255 to names.
    """
    if STRATEGY_CODES_ATTR not in ds.attrs:
        return None
    value = ds.attrs[STRATEGY_CODES_ATTR]
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    try:
        table = json.loads(value) if isinstance(value, str) else None
    except ValueError:
        table = None
    if (not isinstance(table, dict) or not all(isinstance(n, str) for n in table.values())
            or not all(k.isdigit() and int(k) <= 255 for k in table)):
        raise DatasetError("expected JSON text mapping strategy codes (0 .. 255) to names",
                           file=ds.file.filename, key=f"{key}@{STRATEGY_CODES_ATTR}")
    return {int(k): n for k, n in table.items()}


def _column_attr_problems(ds: h5py.Dataset, key) -> list[str]:
    """Messages for a column attribute of the right name but the wrong form."""
    if STRATEGY_CODES_ATTR in ds.attrs and key.endswith("/strategy"):
        try:
            stored_strategy_codes(ds, key)
        except DatasetError as exc:
            return [f"{key}: attribute {STRATEGY_CODES_ATTR}: {exc.message}"]
    return []


def check_layout(file: h5py.File, path, stored: StoredAttrs) -> list[str]:
    """Check what is stored against what a set holds; return failures (empty: as expected).

    Checks that the file has exactly the root attributes of its format version, the two split
    groups and nothing else; each group exactly its attributes (``rows``, ``episodes``) and the
    same columns, each a plain dataset with ``rows`` rows; the manifest lists exactly the stored
    columns.

    Raises
    ------
    DatasetError
        When the set cannot be read safely: a split group missing or a link, a column stored as a
        link or a group, a column with fewer rows than its split's ``rows`` or of zero dimensions.
    """
    failures = []
    expected_root = set(ROOT_ATTRS) | ({SEAL_ATTR} if stored.version >= 2 else set())
    extra = sorted(set(file.attrs) - expected_root)
    if extra:
        failures.append(f"root attributes not part of a format version {stored.version} set: {', '.join(extra)}")
    others = sorted(set(file) - set(SPLITS))
    if others:
        failures.append(f"members not part of a set: {', '.join(others)}")
    names = {}
    for split in SPLITS:
        group = split_group(file, split, path)
        rows = split_rows(file, split, path)
        _whole(_get(group.attrs, "episodes", path, f" of group {split}"), f"{split}/episodes", path,
               f" in group {split}")
        extra = sorted(set(group.attrs) - set(SPLIT_ATTRS))
        if extra:
            failures.append(f"{split}: attributes not part of a set: {', '.join(extra)}")
        names[split] = []
        for name in group:
            key = f"{split}/{name}"
            link = group.get(name, getlink=True)
            if not isinstance(link, h5py.HardLink):
                raise DatasetError(f"expected a column stored in the file, found a {type(link).__name__}",
                                   file=path, key=key)
            ds = group[name]
            if not isinstance(ds, h5py.Dataset):
                raise DatasetError("expected a column (dataset), found a group", file=path, key=key)
            if ds.ndim < 1:
                raise DatasetError("expected a column with one row per entry, found a scalar", file=path, key=key)
            if ds.shape[0] < rows:
                raise DatasetError(f"column has {ds.shape[0]} rows, the split's rows attribute says {rows}",
                                   file=path, key=key)
            if ds.shape[0] > rows:
                failures.append(f"{key}: {ds.shape[0]} rows stored, more than the split's rows attribute ({rows})")
            extra = sorted(set(ds.attrs) - set(COLUMN_ATTRS.get(name, ())))
            if extra:
                failures.append(f"{key}: attributes not part of a set: {', '.join(extra)}")
            failures += _column_attr_problems(ds, key)
            names[split].append(name)
    if sorted(names["train"]) != sorted(names["validation"]):
        failures.append(f"the splits hold different columns (train: {', '.join(sorted(names['train']))}; "
                        f"validation: {', '.join(sorted(names['validation']))})")
    stored_keys = {f"{s}/{n}" for s in SPLITS for n in names[s]}
    unlisted = sorted(stored_keys - set(stored.manifest))
    if unlisted:
        failures.append(f"columns not in the manifest: {', '.join(unlisted)}")
    missing = sorted(set(stored.manifest) - stored_keys)
    if missing:
        failures.append(f"columns in the manifest but not stored: {', '.join(missing)}")
    return failures


def _encode(value):
    """A JSON-able, type-preserving encoding of an attribute value."""
    if isinstance(value, str):
        return ["str", value]
    if isinstance(value, bytes):
        return ["bytes", value.hex()]
    if isinstance(value, (np.ndarray, np.generic, int, float, bool)):
        arr = np.asarray(value)
        if arr.dtype.kind != "O":
            return ["array", arr.dtype.str, list(arr.shape), np.ascontiguousarray(arr).tobytes().hex()]
        return ["objects", [v if isinstance(v, str) else repr(v) for v in arr.ravel().tolist()], list(arr.shape)]
    return ["other", type(value).__name__, repr(value)]  # e.g. h5py.Empty: never in a set as written


def _encode_attr(attrs, key):
    try:
        return _encode(attrs[key])
    except (OSError, TypeError, ValueError) as exc:  # a type h5py cannot read back
        return ["unreadable", str(exc)]


def _dataset_record(ds: h5py.Dataset) -> list:
    return [ds.dtype.str, list(ds.shape), list(ds.chunks or ()), ds.compression or "",
            bool(ds.shuffle)]


def seal_of(file: h5py.File) -> str:
    """SHA-256 of a canonical encoding of every attribute (except the seal) and dataset description.

    The record is JSON with sorted keys: for the root and each group, its attributes by name
    (value with its type, dtype, shape and bytes); for every dataset, its dtype, shape, chunk
    shape and filter. Column bytes are not part of it (the manifest covers them, and the manifest
    is an attribute).
    """
    record = {"attributes": {}, "datasets": {}, "groups": []}

    def attributes(obj, where):
        record["attributes"][where] = {k: _encode_attr(obj.attrs, k) for k in sorted(obj.attrs) if
                                       not (where == "/" and k == SEAL_ATTR)}

    attributes(file, "/")

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset):
            record["datasets"][name] = _dataset_record(obj)
            if len(obj.attrs):
                attributes(obj, name)
        else:
            record["groups"].append(name)
            attributes(obj, name)

    file.visititems(visit)
    record["groups"].sort()
    text = json.dumps(record, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def write_seal(file: h5py.File) -> str:
    """Compute the seal of an open, writable set and store it as the root attribute ``seal``."""
    seal = seal_of(file)
    file.attrs[SEAL_ATTR] = seal
    return seal


def check_seal(file: h5py.File, stored: StoredAttrs) -> list[str]:
    """Failures when the stored seal does not match the file (none for format version 1)."""
    if stored.seal is None:
        return []
    actual = seal_of(file)
    if actual != stored.seal:
        return [f"the seal does not match: attributes, columns' dtypes/shapes or the list of columns changed "
                f"since the set was written (seal {actual[:16]}..., stored {stored.seal[:16]}...)"]
    return []
