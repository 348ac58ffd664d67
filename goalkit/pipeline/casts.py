"""Stored dtypes of observations, actions and goals, and the checked cast of a chunk to them.

The recipe may ask for the observation, action and goal columns in another dtype than the logs
keep (``[output] observation_dtype``, ``action_dtype``; ``[goal] dtype``; docs/recipe.md). A
build casts each chunk's arrays once, vectorised, and refuses a cast that would change what a
value *is* rather than round it:

- a finite value that becomes infinite (beyond float16's 65504 or float32's about 3.4e38);
- a NaN the logs do not have (no float cast makes one, but the check says so explicitly);
- an integer outside the target integer type's range (actions only).

NaN and infinities already in the logs are kept as they are (readers refuse them before a build
sees them). Float narrowing rounds to the nearest representable value, ties to even (IEEE
754-2019, section 4.3.1, roundTiesToEven, the default rounding of numpy's ``astype``): the
relative error of a normal float32 result is at most 2**-24 (half a unit in the last place of
a 24-bit significand). The error names the log file, the key, the episode id and step of the
first offending value, and the value.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from goalkit.errors import LogError, shown

#: Float dtypes a recipe may store observations, goals and actions in.
FLOAT_DTYPES = ("float16", "float32", "float64")
#: Integer dtypes a recipe may store actions in (logs whose actions are integers only).
INT_DTYPES = ("int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64")


def cast_problem(values: np.ndarray, dtype) -> tuple[np.ndarray, np.ndarray | None]:
    """Cast ``values`` to ``dtype`` and find the values the cast would change beyond rounding.

    Parameters
    ----------
    values : ndarray
        Integer or float values.
    dtype : numpy dtype
        A float dtype, or an integer dtype when ``values`` are integers.

    Returns
    -------
    (ndarray, ndarray of bool or None)
        The cast values and, when some value overflows (or becomes NaN), a mask of the same
        shape marking them; None when the cast is clean.

    Examples
    --------
    >>> out, bad = cast_problem(np.array([1.0, 7e4]), "float16")
    >>> bad.tolist()
    [False, True]
    >>> cast_problem(np.array([3, 4], np.int64), "uint8")[1] is None
    True
    """
    dtype = np.dtype(dtype)
    if values.dtype == dtype:
        return values, None
    if values.dtype.kind == "f" and dtype.kind in "iu":
        raise ValueError(f"float values are not cast to {dtype}")
    if dtype.kind in "iu":
        info = np.iinfo(dtype)
        if values.dtype.kind == "u":
            bad = values > info.max
        else:
            bad = (values < info.min) | (values > info.max)
        out = values.astype(dtype) if not bad.any() else None
        return (out, None) if out is not None else (values, bad)
    with np.errstate(over="ignore", invalid="ignore"):
        out = values.astype(dtype)
    if np.isfinite(out).all():          # the usual case: one pass, nothing overflowed
        return out, None
    src = values if values.dtype.kind == "f" else values.astype(np.float64)
    bad = (np.isinf(out) & np.isfinite(src)) | (np.isnan(out) & ~np.isnan(src))
    return (out, None) if not bad.any() else (out, bad)


@dataclass(frozen=True)
class FileTable:
    """Which log file (and which keys) hold each episode id, for messages.

    Attributes
    ----------
    first_ids : ndarray of int64
        Increasing: the first episode id of each entry.
    paths : tuple of str
    keys : tuple of dict
        Role -> the log's key name per entry (``observation``, ``action``; missing roles absent).
    """

    first_ids: np.ndarray
    paths: tuple
    keys: tuple

    def where(self, episode_id: int) -> tuple[str, dict]:
        """The file and the key names of an episode id."""
        i = max(int(np.searchsorted(self.first_ids, int(episode_id), side="right")) - 1, 0)
        return self.paths[i], self.keys[i]


def first_row(bad: np.ndarray) -> int:
    """The first row of a mask (rows along axis 0) with a true entry."""
    return int(np.flatnonzero(bad.reshape(bad.shape[0], -1).any(axis=1))[0])


def _role_keys(layout) -> dict:
    keys = getattr(layout, "keys", None)
    out = {}
    for role in ("observation", "action", "task_goal"):
        name = getattr(keys, role, None) if keys is not None else None
        if name:
            out[role] = str(name)
    return out


def _entries(log, offset: int) -> list:
    keys = _role_keys(getattr(log, "layout", None))
    files = list(getattr(log, "files", None) or [])
    ids = np.asarray(getattr(log, "episode_ids", ()), dtype=np.int64)
    if len(files) > 1 and len(files) == getattr(log, "total_episodes", -1) and hasattr(log, "_file_of"):
        return [(offset + int(e), str(log._file_of(int(e))), keys) for e in ids.tolist()]
    return [(offset, str(log.path), keys)]


def file_table(source) -> FileTable:
    """The :class:`FileTable` of an opened log source (one or several files and sources)."""
    parts = getattr(source, "parts", None)
    rows = []
    if parts is not None:       # goalkit.logs.multi.MultiSource
        for p in parts:
            rows += _entries(p.log, int(p.offset))
    else:
        rows = _entries(source, 0)
    rows.sort(key=lambda r: r[0])
    return FileTable(np.array([r[0] for r in rows], dtype=np.int64), tuple(r[1] for r in rows),
                     tuple(r[2] for r in rows))


@dataclass(frozen=True)
class StoredDtypes:
    """The dtypes a build stores, and where the chunk's values come from (for messages).

    Attributes
    ----------
    observation, action, goal : numpy dtype
        Stored dtypes (``next_observation`` follows ``observation``, ``reached_goal`` the goal).
    files : FileTable
    recipe_file : str
    """

    observation: np.dtype
    action: np.dtype
    goal: np.dtype
    files: FileTable
    recipe_file: str = ""

    def describe(self) -> dict:
        """Column -> dtype name, as stored in the summary (``composition.dtypes``)."""
        return {"observation": self.observation.name, "action": self.action.name,
                "next_observation": self.observation.name, "goal": self.goal.name}

    def cast(self, values: np.ndarray, role: str, recipe_key: str, chunk, *, state_level: bool) -> np.ndarray:
        """``values`` (a column of ``chunk``) cast to the stored dtype of ``role``, checked.

        Raises
        ------
        LogError
            Naming the log file, the key, the episode id and the step of the first value the
            cast would overflow (or make NaN), the value and the recipe key asking for the cast.
        """
        dtype = getattr(self, role)
        out, bad = cast_problem(values, dtype)
        if bad is None:
            return out
        row = first_row(bad)
        offsets = np.asarray(chunk.offsets, dtype=np.int64)
        starts = offsets[:-1] + (np.arange(len(offsets) - 1) if state_level else 0)
        pos = int(np.searchsorted(starts, row, side="right")) - 1
        self.refuse(values, bad, row, int(chunk.episode_ids[pos]), int(row - starts[pos]), role, recipe_key)

    def refuse(self, values, bad, row: int, episode: int, step: int, role: str, recipe_key: str):
        """Raise the :class:`LogError` of the first bad value of ``values[row]`` (see :meth:`cast`)."""
        dtype = self.goal if role in ("goal", "task_goal") else getattr(self, role)
        col = np.flatnonzero(np.atleast_1d(bad[row]).ravel())
        value = np.atleast_1d(values[row]).ravel()[int(col[0])] if col.size else values[row]
        value = value.item() if hasattr(value, "item") else value
        path, keys = self.files.where(episode)
        what = "overflows" if dtype.kind == "f" else "does not fit"
        limit = (f"largest finite {dtype.name} is {np.finfo(dtype).max:g}" if dtype.kind == "f"
                 else f"{dtype.name} holds {np.iinfo(dtype).min} .. {np.iinfo(dtype).max}")
        raise LogError(f"value {shown(value)} {what} {dtype.name} ({limit}), asked for by "
                       f"{self.recipe_file or 'the recipe'} key {recipe_key}; expected values that fit, or a "
                       f"wider dtype",
                       file=path, key=keys.get(role, role), episode=episode, step=step)
