"""Checks shared by the readers: dtypes, shapes, finite values, flags.

Every failure is a one-line :class:`~goalkit.errors.LogError` naming the file, the key, the
episode (position in the whole log) and, for values, the first bad step.
"""

from __future__ import annotations

import numpy as np

from goalkit.errors import LogError
from goalkit.logs.limits import MAX_WIDTH


def numeric(dtype, *, file, key, episode=None, what="a numeric array") -> np.dtype:
    """Refuse non-numeric dtypes (strings, objects, compounds, bools)."""
    dtype = np.dtype(dtype)
    if dtype.kind not in "iuf":
        raise LogError(f"expected {what}, got dtype {dtype}", file=file, key=key, episode=episode)
    return dtype


def rows_2d(shape, *, file, key, episode=None, what) -> tuple[int, int]:
    """Return ``(rows, width)`` of a ``(n,)`` or ``(n, k)`` array, refusing other ranks and
    widths outside 1 .. :data:`~goalkit.logs.limits.MAX_WIDTH`."""
    if len(shape) == 1:
        return int(shape[0]), 1
    if len(shape) == 2:
        width = int(shape[1])
        if not 1 <= width <= MAX_WIDTH:
            raise LogError(f"expected {what} with 1 to {MAX_WIDTH} values per row, got shape "
                           f"{tuple(shape)}", file=file, key=key, episode=episode)
        return int(shape[0]), width
    raise LogError(f"expected {what} of shape (n,) or (n, k), got shape {tuple(shape)}",
                   file=file, key=key, episode=episode)


def float_dtype(dtypes) -> np.dtype:
    """float32 when every input is float32 or float16, else float64 (ints become float64)."""
    dtypes = [np.dtype(d) for d in dtypes]
    if dtypes and all(d.kind == "f" and d.itemsize <= 4 for d in dtypes):
        return np.dtype(np.float32)
    return np.dtype(np.float64)


def first_bad_row(values: np.ndarray) -> int:
    """Index of the first row holding a NaN or inf, or -1 (only float arrays can hold them)."""
    if values.dtype.kind != "f" or values.size == 0:
        return -1
    if np.isfinite(values).all():  # the usual case, one flat pass
        return -1
    ok = np.isfinite(values.reshape(values.shape[0], -1)).all(axis=1)
    bad = np.flatnonzero(~ok)
    return int(bad[0]) if bad.size else -1


def first_bad(values: np.ndarray, offsets: np.ndarray, *, state_level: bool = False):
    """Locate the first NaN/inf of a chunk column as ``(episode position, step)``, or None.

    Parameters
    ----------
    values : ndarray
        A transition-level (or, with ``state_level``, state-level) column of a chunk.
    offsets : ndarray of int64
        The chunk's transition offsets.
    """
    row = first_bad_row(values)
    if row < 0:
        return None
    starts = offsets[:-1] + (np.arange(offsets.shape[0] - 1) if state_level else 0)
    pos = int(np.searchsorted(starts, row, side="right") - 1)
    return pos, row - int(starts[pos])


#: Tolerances of the pairs-convention check ``next_observation[t] == observation[t+1]``
#: (numpy.isclose's own defaults: common practice, not tuned).
PAIRS_RTOL, PAIRS_ATOL = 1e-5, 1e-8


def first_discontinuity(obs: np.ndarray, nxt: np.ndarray, lengths: np.ndarray):
    """Find the first step where ``next_observation[t]`` is not ``observation[t+1]``.

    Parameters
    ----------
    obs, nxt : ndarray, shape (N, D)
        Observation and next observation rows of consecutive episodes (one row per action).
    lengths : ndarray of int
        Transitions per episode (summing to N).

    Returns
    -------
    (int, int, float) or None
        Episode position, step ``t`` and the largest absolute difference there; None when every
        pair agrees within :data:`PAIRS_RTOL` / :data:`PAIRS_ATOL` (NaNs compare equal here:
        they are reported by the finite-value check).
    """
    n = obs.shape[0]
    if n < 2:
        return None
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64)
    inner = np.ones(n - 1, dtype=bool)           # row r pairs with r + 1 inside its episode
    ends = starts[1:] - 1                        # last row of every episode but the final one
    inner[ends[ends >= 0]] = False
    a = nxt[:-1].reshape(n - 1, -1)
    b = obs[1:].reshape(n - 1, -1)
    ok = np.isclose(a, b, rtol=PAIRS_RTOL, atol=PAIRS_ATOL, equal_nan=True).all(axis=1) | ~inner
    bad = np.flatnonzero(~ok)
    if bad.size == 0:
        return None
    r = int(bad[0])
    pos = int(np.searchsorted(starts, r, side="right") - 1)
    diff = float(np.nanmax(np.abs(a[r].astype(np.float64) - b[r].astype(np.float64))))
    return pos, r - int(starts[pos]), diff


def pairs_error(step: int, diff: float, *, file, key, episode) -> LogError:
    """The error for a next observation that is not the following observation."""
    return LogError(f"next_observation at step {step} differs from observation at step {step + 1} "
                    f"(largest difference {diff:.3g}); expected them equal within rtol "
                    f"{PAIRS_RTOL:g} and atol {PAIRS_ATOL:g} -- a reset, dropped frame or "
                    f"misplaced episode boundary inside the episode", file=file, key=key,
                    episode=episode, step=step)


def flags(values: np.ndarray, *, file, key, episode=None) -> np.ndarray:
    """Turn a bool, integer or 0./1. float array into bool, refusing other values."""
    values = np.asarray(values)
    if values.ndim == 2 and values.shape[1] == 1:
        values = values[:, 0]
    if values.dtype.kind == "b":
        return values
    if values.dtype.kind in "iuf":
        bad = np.flatnonzero((values != 0) & (values != 1))
        if bad.size:
            raise LogError(f"expected a bool or 0/1 flag, got {values[bad[0]].item()!r}", file=file,
                           key=key, episode=episode, step=int(bad[0]))
        return values != 0
    raise LogError(f"expected a bool or 0/1 flag, got dtype {values.dtype}", file=file, key=key,
                   episode=episode)


#: Task ids are kept as int64: the range every integer dtype's values must fit.
TASK_MIN, TASK_MAX = int(np.iinfo(np.int64).min), int(np.iinfo(np.int64).max)


def task_dtype(dtype, *, file, key, episode=None) -> np.dtype:
    """Refuse task-id dtypes other than integers and floats (floats must hold integers)."""
    dtype = np.dtype(dtype)
    if dtype.kind not in "iuf":
        raise LogError(f"expected integer task ids, got dtype {dtype}", file=file, key=key, episode=episode)
    return dtype


def task_ids(values, *, file, key, locate=None) -> np.ndarray:
    """Task ids as int64, refusing values int64 cannot hold exactly.

    Any integer dtype is accepted when its values fit int64 (uint64 values above 2**63 - 1 are
    refused); float ids are accepted when every value is finite, integral and inside int64's
    range (``3.0`` is task 3, ``2.5`` is refused).

    Parameters
    ----------
    values : ndarray
        Task ids.
    locate : callable, optional
        Element index -> ``{"episode": ..., "step": ...}`` for messages.

    Raises
    ------
    LogError
        Naming the first offending value and where it is.
    """
    arr = np.asarray(values)
    task_dtype(arr.dtype, file=file, key=key)
    flat = arr.reshape(-1)
    if arr.dtype.kind == "i":
        return flat.astype(np.int64)
    if arr.dtype.kind == "u":
        bad = flat > np.uint64(TASK_MAX)
        why = f"is above the int64 maximum {TASK_MAX}"
    else:
        with np.errstate(invalid="ignore"):
            bad = ~np.isfinite(flat) | (flat != np.floor(flat)) | (flat < -2.0 ** 63) | (flat >= 2.0 ** 63)
        why = "is not an integer that int64 can hold"
    hits = np.flatnonzero(bad)
    if hits.size:
        i = int(hits[0])
        where = {} if locate is None else locate(i)
        raise LogError(f"task id {flat[i].item()!r} {why}; expected integer task ids that fit int64",
                       file=file, key=key, **where)
    return flat.astype(np.int64)


def task_value(value, *, file, key, episode=None) -> int:
    """Turn a scalar task id (attribute, scalar dataset, constant array) into an int."""
    arr = np.asarray(value)
    if arr.ndim > 0:
        flat = arr.reshape(-1)
        if flat.size == 0:
            raise LogError("expected a task id, got an empty array", file=file, key=key, episode=episode)
        changed = np.flatnonzero(flat != flat[0])
        if changed.size:
            raise LogError(f"expected one task id per episode, the value changes from {flat[0].item()!r} to "
                           f"{flat[changed[0]].item()!r}", file=file, key=key, episode=episode,
                           step=int(changed[0]))
        arr = flat[:1]
        with_step = True
    else:
        with_step = False
    if arr.dtype.kind not in "iuf":
        raise LogError(f"expected an integer task id, got {arr.reshape(-1)[0].item()!r}", file=file,
                       key=key, episode=episode)
    return int(task_ids(arr.reshape(-1), file=file, key=key,
                        locate=lambda i: {"episode": episode, "step": 0 if with_step else None})[0])
