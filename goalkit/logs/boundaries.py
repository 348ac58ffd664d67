"""Episode boundaries of flat logs: row counts per episode from ids, done flags or offsets.

Every function returns ``counts`` (int64, one entry per episode): how many rows of the array's
own row space each episode owns, in order. The caller turns rows into transitions according to
the observation convention (see :mod:`goalkit.logs.flat`). Problems are raised as
:class:`~goalkit.errors.LogError` naming the file, the key and the first offending row.
"""

from __future__ import annotations

import numpy as np

from goalkit.errors import LogError


def _as_1d(values, *, file, key, what) -> np.ndarray:
    values = np.asarray(values)
    if values.ndim != 1:
        raise LogError(f"expected a 1-D {what} array, got shape {values.shape}", file=file, key=key)
    if values.shape[0] == 0:
        raise LogError(f"expected a non-empty {what} array, got 0 rows", file=file, key=key)
    return values


def counts_from_ids(ids, *, file=None, key=None) -> np.ndarray:
    """Rows per episode from an episode-id array; a new episode starts where the id changes.

    Each episode's rows must be contiguous: an id that comes back after another episode is an
    error (interleaved logs cannot be split safely).

    Examples
    --------
    >>> counts_from_ids([4, 4, 4, 7, 7, 9]).tolist()
    [3, 2, 1]
    """
    ids = _as_1d(ids, file=file, key=key, what="episode-id")
    return counts_from_id_blocks([ids], file=file, key=key)


def counts_from_id_blocks(blocks, *, file=None, key=None) -> np.ndarray:
    """:func:`counts_from_ids` over consecutive blocks of the array (read a block at a time)."""
    starts, first_ids, prev, pos = [], [], None, 0
    for block in blocks:
        block = np.asarray(block)
        if not (np.issubdtype(block.dtype, np.integer) or block.dtype.kind in "US"):
            raise LogError(f"expected an integer episode-id array, got dtype {block.dtype}",
                           file=file, key=key)
        if block.shape[0] == 0:
            continue
        d = np.flatnonzero(block[1:] != block[:-1]) + 1
        if prev is None or block[0] != prev:
            d = np.concatenate([[0], d]).astype(np.int64)
        starts.append(d + pos)
        first_ids.append(block[d])
        prev, pos = block[-1], pos + block.shape[0]
    if pos == 0:
        raise LogError("expected a non-empty episode-id array, got 0 rows", file=file, key=key)
    starts = np.concatenate(starts).astype(np.int64)
    first_ids = np.concatenate(first_ids)
    uniq, counts_seen = np.unique(first_ids, return_counts=True)
    if np.any(counts_seen > 1):
        bad = uniq[counts_seen > 1][0]
        again = starts[np.flatnonzero(first_ids == bad)[1]]
        raise LogError(f"episode id {bad.item()!r} comes back at row {again} after other episodes; "
                       f"expected each episode's rows to be contiguous", file=file, key=key)
    return np.diff(np.concatenate([starts, [pos]])).astype(np.int64)


def counts_from_done(done, *, file=None, key=None) -> tuple[np.ndarray, bool]:
    """Rows per episode from a done flag that is true on the last row of each episode.

    Returns
    -------
    counts : ndarray of int64
        Rows per episode; when the flag does not end the last episode, its rows are the last
        entry.
    ended : bool
        Whether the last row is flagged (false means the last episode was cut short).

    Examples
    --------
    >>> counts, ended = counts_from_done([0, 0, 1, 0, 1])
    >>> counts.tolist(), ended
    ([3, 2], True)
    """
    done = _as_1d(done, file=file, key=key, what="done-flag")
    return counts_from_done_blocks([done], file=file, key=key)


def counts_from_done_blocks(blocks, *, file=None, key=None) -> tuple[np.ndarray, bool]:
    """:func:`counts_from_done` over consecutive blocks of the array (read a block at a time)."""
    ends, pos, last = [], 0, False
    for block in blocks:
        block = np.asarray(block)
        if block.dtype.kind == "b":
            flag = block
        elif block.dtype.kind in "iuf":
            bad = np.flatnonzero((block != 0) & (block != 1))
            if bad.size:
                raise LogError(f"expected a bool or 0/1 done flag, got {block[bad[0]].item()!r} at "
                               f"row {pos + bad[0]}", file=file, key=key)
            flag = block != 0
        else:
            raise LogError(f"expected a bool or 0/1 done flag, got dtype {block.dtype}", file=file, key=key)
        if flag.shape[0] == 0:
            continue
        ends.append(np.flatnonzero(flag) + 1 + pos)
        pos += flag.shape[0]
        last = bool(flag[-1])
    if pos == 0:
        raise LogError("expected a non-empty done-flag array, got 0 rows", file=file, key=key)
    ends = np.concatenate(ends).astype(np.int64)
    if not last:
        ends = np.concatenate([ends, [pos]])
    return np.diff(np.concatenate([[0], ends])).astype(np.int64), last


def counts_from_offsets(offsets, total: int, *, file=None, key=None) -> np.ndarray:
    """Rows per episode from start indices ``(E,)`` or offsets ``(E + 1,)`` into ``total`` rows.

    The array is read as offsets when its last entry equals ``total`` and as starts otherwise
    (a start can never equal ``total``). Both must begin at 0 and never decrease; two equal
    neighbours make an empty episode (count 0), which the reader reports per episode.

    Examples
    --------
    >>> counts_from_offsets([0, 3, 5], 6).tolist()
    [3, 2, 1]
    >>> counts_from_offsets([0, 3, 5, 6], 6).tolist()
    [3, 2, 1]
    """
    offsets = _as_1d(offsets, file=file, key=key, what="offsets")
    if not np.issubdtype(offsets.dtype, np.integer):
        raise LogError(f"expected integer offsets, got dtype {offsets.dtype}", file=file, key=key)
    offsets = offsets.astype(np.int64)
    if offsets[0] != 0:
        raise LogError(f"expected offsets to start at 0, got {offsets[0]}", file=file, key=key)
    if offsets[-1] > total:
        raise LogError(f"expected offsets at most {total} (the number of rows), got {offsets[-1]} "
                       f"at entry {offsets.shape[0] - 1}", file=file, key=key)
    down = np.flatnonzero(np.diff(offsets) < 0)
    if down.size:
        i = int(down[0]) + 1
        raise LogError(f"expected non-decreasing offsets, entry {i} is {offsets[i]} after "
                       f"{offsets[i - 1]}", file=file, key=key)
    if offsets[-1] != total:
        offsets = np.concatenate([offsets, [total]])
    return np.diff(offsets)
