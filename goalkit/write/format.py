"""Names, dtypes and version of goalkit's dataset layout (documented in docs/dataset.md).

A built set is one HDF5 file::

    /                     attributes: format, format_version, goalkit_version, mode, seed,
                          recipe (TOML text), provenance (JSON), summary (JSON), manifest (JSON),
                          seal (format version 2)
    /train/<column>       one row per (transition, goal) pair, rows sorted by
    /validation/<column>  (source_episode, source_step, slot); group attributes rows, episodes;
                          the strategy column's attribute codes (JSON code -> name)

Every column is chunked along rows. ``manifest`` maps ``"split/column"`` to the SHA-256 of the
column's bytes in C order, so a reader can check any array without trusting the file. ``seal``
is the SHA-256 of every attribute and every column's dtype, shape and storage (see
:mod:`goalkit.write.seal`). Version 1 sets (no seal) are still read and verified.
"""

from __future__ import annotations

import json
from pathlib import Path

from goalkit.errors import DatasetError
from goalkit.rows import (END_FLAG_FIELDS, GOAL_MASK_FIELD, GRAPH_STEPS_FIELD, INDEX_FIELDS, MATERIAL_FIELDS, SOURCE_FIELD, SPLIT_CODES, SPLITS,
                          TASK_REWARD_FIELD)

__all__ = ["FORMAT_NAME", "FORMAT_VERSION", "INDEX_COLUMNS", "MATERIAL_COLUMNS", "SPLITS", "SPLIT_CODES",
           "TASK_REWARD_COLUMN", "END_FLAG_COLUMNS", "SOURCE_COLUMN", "GOAL_MASK_COLUMN", "COLUMN_ATTRS", "STRATEGY_CODES_ATTR", "column_names", "is_goal_set",
           "strategy_codes_text"]

FORMAT_NAME = "goalkit-goal-set"
FORMAT_VERSION = 2
#: Column name -> (dtype, per-row shape kind, meaning), from the one row schema
#: (:mod:`goalkit.rows`). Shape kind "" is a scalar per row, "goal" is (G,), "obs" (D,), "act" (A,).
INDEX_COLUMNS = {f.name: (f.dtype, f.kind, f.meaning) for f in INDEX_FIELDS.values()}

#: Extra columns of a materialised set.
MATERIAL_COLUMNS = {f.name: (f.dtype, f.kind, f.meaning) for f in MATERIAL_FIELDS.values()}

#: Optional column, present when the logs carry a task reward: (name, dtype, meaning).
TASK_REWARD_COLUMN = (TASK_REWARD_FIELD.name, TASK_REWARD_FIELD.dtype, TASK_REWARD_FIELD.meaning)
#: Optional column, present when the recipe has a ``[mask]`` table: (name, dtype, meaning).
GOAL_MASK_COLUMN = (GOAL_MASK_FIELD.name, GOAL_MASK_FIELD.dtype, GOAL_MASK_FIELD.meaning)


#: Optional columns, present when the layout maps the environment's end flags: name -> (dtype, meaning).
END_FLAG_COLUMNS = {f.name: (f.dtype, f.meaning) for f in END_FLAG_FIELDS.values()}
#: Optional column, present when the recipe names its sources: (name, dtype, meaning).
SOURCE_COLUMN = (SOURCE_FIELD.name, SOURCE_FIELD.dtype, SOURCE_FIELD.meaning)


#: Attributes a column may carry: the ``strategy`` column's ``codes`` is the set's own strategy
#: table, JSON text ``{"code": "name", ...}`` (sets written before it have no column attributes).
STRATEGY_CODES_ATTR = "codes"
COLUMN_ATTRS = {"strategy": (STRATEGY_CODES_ATTR,)}


def strategy_codes_text(names: dict) -> str:
    """The ``codes`` attribute of the strategy column for a code -> name table."""
    return json.dumps({str(int(c)): str(names[c]) for c in sorted(names)}, separators=(", ", ": "))


def column_names(mode: str, has_task_reward: bool, end_flags=(), has_source: bool = False,
                 has_goal_mask: bool = False, has_graph: bool = False) -> list[str]:
    """Return the column names of a set in ``mode``, in the order they are written.

    ``end_flags`` names the end-flag columns present (:data:`END_FLAG_COLUMNS`); ``has_source``:
    the set has the source column (:data:`SOURCE_COLUMN`); ``has_goal_mask``: the goal-mask
    column (:data:`GOAL_MASK_COLUMN`); ``has_graph``: the ``graph_steps`` column.
    """
    names = list(INDEX_COLUMNS)
    if mode == "materialised":
        names += list(MATERIAL_COLUMNS)
    if has_task_reward:
        names.append(TASK_REWARD_COLUMN[0])
    names += [n for n in END_FLAG_COLUMNS if n in end_flags]
    if has_source:
        names.append(SOURCE_COLUMN[0])
    if has_goal_mask:
        names.append(GOAL_MASK_COLUMN[0])
    if has_graph:
        names.append(GRAPH_STEPS_FIELD.name)
    return names


def is_goal_set(path) -> bool:
    """True when ``path`` is an HDF5 file whose root attribute ``format`` is :data:`FORMAT_NAME`.

    This is what makes an existing file "ours": only such a file is replaced by a build, and only
    when replacing is asked for (``--replace``).
    """
    import h5py

    try:
        with h5py.File(path, "r") as f:
            fmt = f.attrs.get("format")
    except (OSError, ValueError):
        return False
    if isinstance(fmt, bytes):
        fmt = fmt.decode("utf-8", "replace")
    return fmt == FORMAT_NAME


def open_set_file(path):
    """Open the HDF5 file of a set read-only, refusing what is not a readable regular file.

    Raises
    ------
    DatasetError
        One line: the file is missing, is not a regular file (a folder, a device or a FIFO,
        which would block or never end), or is not readable as HDF5.
    """
    import h5py

    path = Path(path)
    if not path.exists():
        raise DatasetError("file not found", file=path)
    if not path.is_file():
        raise DatasetError("not a regular file (a folder, device or FIFO)", file=path)
    try:
        return h5py.File(path, "r")
    except OSError as exc:
        raise DatasetError(f"not a readable HDF5 file ({exc})", file=path) from None
