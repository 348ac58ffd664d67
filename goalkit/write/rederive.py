"""What verify re-derives besides the rows: sources, the recipe, columns, summary, provenance.

Used by :func:`goalkit.write.verify.verify_set`. Each function compares one stored fact with what
the logs, the stored recipe and the set's ``seed`` attribute give, and reports failures as plain
messages (or raises :class:`~goalkit.errors.DatasetError` when the set cannot be read).
"""

from __future__ import annotations

import json
import os
import stat
from dataclasses import replace
from pathlib import Path

import numpy as np

from goalkit.errors import DatasetError
from goalkit.pipeline.build import provenance
from goalkit.write.format import SPLITS
from goalkit.write.provenance import file_digest, with_relative
from goalkit.write.relocate import file_entries
from goalkit.write.resolve import recipe_of
from goalkit.write.writer import _json_default


def source_entries(gs) -> list:
    """The file entries of a set's provenance (logs, embedding, library), type-checked.

    Raises
    ------
    DatasetError
        When an entry is not ``{"path": str, "bytes": int, "sha256": str[, "relative": str]}``.
    """
    return [e for _, e in file_entries(gs.provenance, gs.path)]


def stored_recipe(gs, report, relocation=None):
    """The recipe stored in a set, with the set's own seed, its files where ``relocation`` found
    them; None (and failures) when unusable."""
    recipe = recipe_of(gs, relocation)
    recipe = replace(recipe, seed=gs.seed)
    if recipe.output.mode != gs.mode:
        report.fail(f"mode attribute is {gs.mode!r}, the stored recipe builds {recipe.output.mode!r}")
    paths = [("provenance.logs_path", recipe.logs_path, True), ("provenance.layout_path", recipe.layout_path, False),
             ("recipe goal.embedding", recipe.goal.embedding, False),
             ("recipe library", getattr(recipe.mixture, "library", None), False)]
    for key, p, folder_ok in paths:
        if p is None:
            continue
        try:
            info = os.stat(p)
        except OSError:
            continue  # opening it reports the missing file with its own message
        if not (stat.S_ISREG(info.st_mode) or (folder_ok and stat.S_ISDIR(info.st_mode))):
            report.fail(f"{key} {p}: not a regular file (a device or FIFO); it is not read")
    return recipe if report.ok else None


def check_columns(gs, plan, rows_expected: dict, report) -> bool:
    """Stored columns, dtypes, shapes and split attributes against what the recipe produces."""
    expected = plan.columns
    for s in SPLITS:
        stored = set(gs.file[s])
        missing = [n for n in expected if n not in stored]
        extra = sorted(stored - set(expected))
        if missing:
            report.fail(f"{s}: columns the recipe produces are missing: {', '.join(missing)}")
        if extra:
            report.fail(f"{s}: columns the recipe does not produce: {', '.join(extra)}")
        for name, (dtype, shape) in expected.items():
            if name not in stored:
                continue
            ds = gs.file[s][name]
            if ds.dtype != np.dtype(dtype) or tuple(ds.shape[1:]) != tuple(shape):
                raise DatasetError(f"column of dtype {ds.dtype} and row shape {tuple(ds.shape[1:])}, expected "
                                   f"{np.dtype(dtype)} and {tuple(shape)}", file=gs.path, key=f"{s}/{name}")
        out = plan.recipe.output
        for name in sorted(stored & set(expected)):
            ds = gs.file[s][name]
            chunk = (min(out.chunk_rows, ds.shape[0]) if ds.shape[0] else out.chunk_rows)
            if (ds.chunks or (None,))[0] != chunk or (ds.compression or "none") != out.compression:
                report.fail(f"{s}/{name}: stored in chunks of {(ds.chunks or (None,))[0]} rows with "
                            f"{ds.compression or 'no'} compression, the recipe writes {chunk} rows with "
                            f"{out.compression}")
                break
        if gs.rows(s) != rows_expected[s]:
            report.fail(f"{s}: rows attribute is {gs.rows(s)}, the recipe produces {rows_expected[s]} rows")
        episodes = int(np.sum(plan.splits == SPLITS.index(s)))
        stored_episodes = int(gs.file[s].attrs["episodes"])
        if stored_episodes != episodes:
            report.fail(f"{s}: episodes attribute is {stored_episodes}, the recipe puts {episodes} episodes there")
    return report.ok


def provenance_differences(gs, plan, source, digests, relocation=None) -> list:
    """The stored provenance against the one re-derived from the recipe and the logs.

    Files found elsewhere (``relocation``) are compared under their recorded paths; each file's
    ``relative`` path is re-derived from its recorded path and the recorded ``set_folder``.
    """
    log_files = []
    for f in source.files:
        resolved = str(Path(f).resolve())
        digest = digests.get(resolved) or file_digest(f)
        log_files.append({"path": resolved, "bytes": os.stat(f).st_size, "sha256": digest})
    fresh = as_stored(provenance(plan, source, log_files=log_files))
    if relocation is not None:
        fresh = relocation.restore(fresh)
    stored = dict(gs.provenance)
    out = []
    folder = stored.get("set_folder")
    if "set_folder" in stored:   # recorded where the set was written (covered by the seal)
        if isinstance(folder, str) and folder:
            fresh = as_stored(with_relative(fresh, folder))
        else:
            out.append("provenance.set_folder: expected the folder as text")
    # recorded, not re-derivable: the goalkit that built the set (must agree with the attribute) and
    # where the recipe was read from (the base of its relative paths; covered by the seal)
    if stored.get("goalkit_version") != gs.stored.goalkit_version:
        out.append(f"provenance.goalkit_version {stored.get('goalkit_version')!r} differs from the "
                   f"goalkit_version attribute {gs.stored.goalkit_version!r}")
    if not isinstance(stored.get("recipe_file", ""), str):
        out.append("provenance.recipe_file: expected text")
    for key in ("goalkit_version", "recipe_file"):
        fresh.pop(key, None)
        stored.pop(key, None)
    return out + differences(fresh, stored, "provenance")


def as_stored(record: dict) -> dict:
    """``record`` as it reads back from the set's JSON attribute (numpy scalars, tuples, int keys)."""
    return json.loads(json.dumps(record, sort_keys=True, default=_json_default))


def differences(expected, stored, where: str, limit: int = 5) -> list:
    """Messages for the leaves where ``stored`` differs from ``expected`` (nested dicts and lists)."""
    out = []

    def walk(e, s, at):
        if len(out) >= limit:
            return
        if isinstance(e, dict) and isinstance(s, dict):
            for k in sorted(set(e) | set(s), key=str):
                if k not in s:
                    out.append(f"{at}.{k} is missing (re-derived: {_short(e[k])})")
                elif k not in e:
                    out.append(f"{at}.{k} is stored but not re-derived (stored: {_short(s[k])})")
                else:
                    walk(e[k], s[k], f"{at}.{k}")
        elif isinstance(e, list) and isinstance(s, list) and len(e) == len(s):
            for i, (a, b) in enumerate(zip(e, s)):
                walk(a, b, f"{at}[{i}]")
        elif type(e) is not type(s) or e != s:
            if isinstance(e, float) and isinstance(s, float) and np.isnan(e) and np.isnan(s):
                return
            out.append(f"{at} is {_short(s)}, re-derived {_short(e)}")

    walk(expected, stored, where)
    return out


def _short(value, width: int = 60) -> str:
    text = repr(value)
    return text if len(text) <= width else text[:width - 3] + "..."
