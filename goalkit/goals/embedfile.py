"""Embedding files: a fitted embedding saved as ``.npz`` (no pickles).

Keys of the archive (all plain arrays; strings are 0-d unicode arrays):

``format``            ``"goalkit-embedding"``
``version``           format version, int (currently 1)
``kind``              the embedding's kind (``raw``, ``standardised``, ``pca``, ``sfa``, ``precomputed``, ``frames``)
``params``            JSON object of the hyperparameters
``attr.NAME``         fitted arrays (``NAME`` ends in ``_``)
``inner.*``           for ``frames``: the same keys for the embedding fed with the frames
``goal_map``          JSON object: ``input`` (observation/frame/state), ``indices``, ``fields``
``summary``           JSON object: fit diagnostics (informational, not read back)

Files are written through :mod:`goalkit.outputs` (an exclusive temporary name in the same
directory, then published), so an output path never holds a half-written file, and an existing
file is replaced only when asked for and only if it is a goalkit embedding file
(:func:`is_embedding_file`). ``np.savez`` stores a fixed member timestamp, so the
same embedding gives byte-identical files.
"""

from __future__ import annotations

import json
import os
import zipfile
import zlib
from pathlib import Path

import numpy as np

from goalkit.errors import EmbeddingError, LogError
from goalkit.goals.base import KINDS, Embedding
from goalkit.logs import limits
from goalkit.logs.npzfile import NpzArrays
from goalkit.outputs import output_file

FORMAT = "goalkit-embedding"
VERSION = 1


def _flatten(emb: Embedding, prefix: str) -> dict[str, np.ndarray]:
    out = {prefix + "kind": np.asarray(emb.kind),
           prefix + "params": np.asarray(json.dumps(emb.get_params(), sort_keys=True))}
    for name, arr in emb.state().items():
        out[f"{prefix}attr.{name}"] = np.asarray(arr)
    if emb._nested:
        out.update(_flatten(emb.embedding, prefix + "inner."))
    return out


def is_embedding_file(path) -> bool:
    """True when ``path`` is an ``.npz`` archive whose ``format`` member is :data:`FORMAT`.

    Only such a file is replaced by :func:`save_embedding` (and only with ``replace``).
    """
    try:
        with np.load(path, allow_pickle=False) as npz:
            return bool(npz["format"].shape == () and str(npz["format"]) == FORMAT)
    except (OSError, ValueError, KeyError, AttributeError, EOFError, zipfile.BadZipFile):
        return False


def save_embedding(path, embedding: Embedding, goal_map: dict | None = None, replace: bool = False) -> Path:
    """Write a fitted embedding to ``path`` (``.npz``), atomically.

    Parameters
    ----------
    path : str or Path
        Output file; its directory must exist.
    embedding : Embedding
        A fitted embedding.
    goal_map : dict, optional
        How a goal map reads states for it: ``{"input": ..., "indices": ..., "fields": ...}``.
    replace : bool
        Replace an existing goalkit embedding file at ``path`` (anything else is never replaced).

    Returns
    -------
    Path
        The path written.
    """
    path = Path(path)
    if not path.parent.is_dir():
        raise EmbeddingError("expected an existing directory for the embedding file", file=path)
    arrays = {"format": np.asarray(FORMAT), "version": np.asarray(VERSION, dtype=np.int64)}
    arrays.update(_flatten(embedding, ""))
    arrays["goal_map"] = np.asarray(json.dumps(goal_map or {"input": embedding.input_kind, "indices": None,
                                                            "fields": []}, sort_keys=True))
    arrays["summary"] = np.asarray(json.dumps(embedding.summary(), sort_keys=True))
    with output_file(path, replace=replace, ours=is_embedding_file, what="embedding file") as fh:
        np.savez(fh, **arrays)
    return path


def _string(data, key: str, file) -> str:
    if key not in data:
        raise EmbeddingError("expected key in a goalkit embedding file, it is missing", file=file, key=key)
    arr = data[key]
    if arr.shape != () or arr.dtype.kind != "U":
        raise EmbeddingError(f"expected a string, got dtype {arr.dtype} shape {arr.shape}", file=file, key=key)
    return str(arr)


def _json(data, key: str, file) -> dict:
    text = _string(data, key, file)
    try:
        obj = json.loads(text)
    except json.JSONDecodeError as exc:
        raise EmbeddingError(f"expected a JSON object, got unreadable text ({exc.msg})", file=file, key=key) from None
    if not isinstance(obj, dict):
        raise EmbeddingError(f"expected a JSON object, got {type(obj).__name__}", file=file, key=key)
    return obj


def _build(data, prefix: str, file) -> Embedding:
    kind = _string(data, prefix + "kind", file)
    if kind not in KINDS:
        raise EmbeddingError(f"expected an embedding kind among {', '.join(sorted(KINDS))}, got '{kind}'",
                             file=file, key=prefix + "kind")
    cls = KINDS[kind]
    params = _json(data, prefix + "params", file)
    unknown = sorted(set(params) - set(cls._params))
    if unknown:
        raise EmbeddingError(f"expected hyperparameters of a {kind} embedding ({', '.join(cls._params) or 'none'}), "
                             f"got '{unknown[0]}'", file=file, key=prefix + "params")
    try:
        if cls._nested:
            emb = cls(_build(data, prefix + "inner.", file), **params)
        else:
            emb = cls(**params)
    except TypeError as exc:
        raise EmbeddingError(f"expected hyperparameters of a {kind} embedding, got {params} ({exc})",
                             file=file, key=prefix + "params") from None
    arrays = {}
    for name in cls._arrays:
        key = f"{prefix}attr.{name}"
        if key not in data:
            raise EmbeddingError(f"expected fitted array '{name}' of a {kind} embedding, it is missing",
                                 file=file, key=key)
        arrays[name] = data[key]
    try:
        emb.set_state(arrays, file=file)
    except EmbeddingError as exc:
        if prefix and exc.key is not None and not exc.key.startswith(prefix):
            exc.key = prefix + exc.key
            exc.args = (exc.render(),)
        raise
    return emb


def load_embedding_file(path) -> tuple[Embedding, dict]:
    """Read an embedding file; return the fitted embedding and its goal-map settings.

    Raises
    ------
    EmbeddingError
        The file is missing, not an ``.npz`` archive, holds pickled objects, is not a goalkit
        embedding, has an unknown kind or version, or inconsistent arrays (naming the key).
    """
    file = str(path)
    if not os.path.lexists(file):
        raise EmbeddingError("expected an embedding file (.npz), it does not exist", file=file)
    limits.regular_file(file, what="an embedding file (.npz)", error=EmbeddingError)
    try:
        npz = np.load(file, allow_pickle=False)
    except (zipfile.BadZipFile, ValueError, OSError, EOFError) as exc:
        raise EmbeddingError(f"expected an .npz archive, could not read it ({type(exc).__name__})", file=file) from None
    if not isinstance(npz, np.lib.npyio.NpzFile):
        raise EmbeddingError("expected an .npz archive, got a single .npy array", file=file)
    try:                  # declared shapes checked against the archive before any member is loaded
        headers = NpzArrays(file)
        for key in headers.keys():
            headers.shape(key)
    except LogError as exc:
        npz.close()
        raise EmbeddingError(exc.message, file=file, key=exc.key) from None
    with npz:
        data = {}
        for key in npz.files:
            try:
                data[key] = npz[key]
            except ValueError:
                raise EmbeddingError("expected a plain array, got pickled objects (not loaded)", file=file,
                                     key=key) from None
            except (zipfile.BadZipFile, OSError, EOFError, zlib.error) as exc:
                raise EmbeddingError(f"expected a readable array, got a damaged member ({type(exc).__name__})",
                                     file=file, key=key) from None
    fmt = _string(data, "format", file)
    if fmt != FORMAT:
        raise EmbeddingError(f"expected '{FORMAT}', got '{fmt}'", file=file, key="format")
    if "version" not in data:
        raise EmbeddingError("expected key in a goalkit embedding file, it is missing", file=file, key="version")
    ver = data["version"]
    if ver.shape != () or ver.dtype.kind not in "iu":
        raise EmbeddingError(f"expected an integer version, got dtype {ver.dtype} shape {ver.shape}", file=file,
                             key="version")
    if int(ver) != VERSION:
        raise EmbeddingError(f"expected format version {VERSION}, got {int(ver)} (written by another goalkit?)",
                             file=file, key="version")
    emb = _build(data, "", file)
    goal_map = _json(data, "goal_map", file)
    return emb, goal_map


def load_embedding(path) -> Embedding:
    """Read a fitted embedding from an embedding file (see :func:`load_embedding_file`)."""
    return load_embedding_file(path)[0]
