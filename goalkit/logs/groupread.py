"""Reading a range of episode groups straight into the chunk's columns (grouped HDF5 logs).

(Planning the groups with low-level calls: :mod:`goalkit.logs.groupplan`.)

The grouped reader's general path reads each episode's datasets as arrays and concatenates
them; with thousands of small episodes, most of its time goes to Python bookkeeping around
HDF5 calls. This module reads the same values with h5py's low-level calls into arrays
allocated once per chunk: each dataset is opened once (``h5d.open`` on the low-level group)
and read into its rows (and, for an observation field, its columns) of the chunk's buffer;
HDF5 checks that the stored shape still holds as many values as the plan says.

It serves logs whose keys are plain names inside each episode group (no column keys, no
paths), stored with one dtype per key across the log, with ``T + 1`` or ``T`` observation
rows per episode. Anything else -- and any problem while reading (a damaged chunk, a link
that is no longer a hard link, a flag value other than 0/1) -- returns None, and the caller
reads the chunk with the general path, which names the problem exactly as it always has.
The values, dtypes and shapes are those of the general path, bit for bit (tests compare them).
"""

from __future__ import annotations

import h5py
import numpy as np

from goalkit.logs import checks
from goalkit.logs.access import READ_ERRORS, memory_type
from goalkit.logs.columns import ColumnKey

#: Flag roles -> EpisodeSet column.
FLAG_COLUMNS = (("success", "success"), ("termination", "terminations"), ("time_limit", "time_limits"))
_HARD = h5py.h5l.TYPE_HARD


class _Refused(Exception):
    """The fast path cannot read this chunk (the general path will, or will name why not)."""


def read_plan(layout, convention: str, key_dtypes: dict, obs_dtype, action_dtype):
    """What the fast path reads, or None when it does not serve this log.

    Returns
    -------
    list of (column, key, dtype, target dtype, state_level, columns) or None
        ``columns`` is ``(first, width)`` of an observation field, else None.
    """
    if convention not in ("T+1", "T") or key_dtypes is None:
        return None
    k = layout.keys
    obs_keys = layout.observation_keys()
    used = list(obs_keys) + [k.action] + [getattr(k, r) for r in ("reward", "task_goal", "frame")
                                           if getattr(k, r) is not None]
    used += [getattr(k, r) for r, _ in FLAG_COLUMNS if getattr(k, r) is not None]
    for key in used:
        if isinstance(key, ColumnKey) or "/" in key or key not in key_dtypes:
            return None
    out = []
    for key in obs_keys:
        out.append(("observations", key, key_dtypes[key], np.dtype(obs_dtype), True))
    out.append(("actions", k.action, key_dtypes[k.action], np.dtype(action_dtype), False))
    if k.reward is not None:
        d = key_dtypes[k.reward]
        out.append(("rewards", k.reward, d, checks.float_dtype([d]), False))
    for role, name in FLAG_COLUMNS:
        key = getattr(k, role)
        if key is not None:
            d = key_dtypes[key]
            if d.kind not in "biuf":
                return None
            out.append((name, key, d, d, False))
    if k.task_goal is not None:
        d = key_dtypes[k.task_goal]
        out.append(("task_goals", k.task_goal, d, checks.float_dtype([d]), False))
    if k.frame is not None:
        out.append(("frames", k.frame, key_dtypes[k.frame], np.dtype(np.uint8), True))
    for _, _, stored, target, _ in out:
        if stored.kind not in "biuf" or target.kind not in "biuf":
            return None
    return out


def _direct(stored: np.dtype, target: np.dtype) -> bool:
    """True when HDF5 may convert while reading: no conversion, or a float widening (exact)."""
    return stored == target or (stored.kind == "f" and target.kind == "f" and stored.itemsize < target.itemsize)


def read_groups(h5, groups: list, metas: list, ids, plan, widths, tails: dict, layout):
    """Read episodes ``ids`` (positions in the whole log) into EpisodeSet columns, or None.

    Parameters
    ----------
    h5 : h5py.File
        The open log.
    groups : list of str
        Group path of every episode of the log.
    metas : list of EpisodeMeta
        Every episode's plan (steps, task).
    ids : ndarray of int64
    plan : list
        From :func:`read_plan`.
    widths : sequence of int
        Width of each observation field, in order.
    tails : dict
        Column name -> shape of one row (``actions``, ``task_goals``, ``frames``; others ``()``).
    layout : Layout
    """
    try:
        return _read(h5, groups, metas, ids, plan, widths, tails, layout)
    except (_Refused, *READ_ERRORS):
        return None


def _read(h5, groups, metas, ids, plan, widths, tails, layout):
    ids = [int(e) for e in ids]
    steps = [metas[e].steps for e in ids]
    n = sum(steps)
    s = n + len(ids)
    obs_width = int(sum(widths))
    edges = np.concatenate([[0], np.cumsum(widths)]).astype(int).tolist()
    cols, where = {}, []
    field = 0
    for name, key, stored, target, state_level in plan:
        if name == "observations":
            where.append((edges[field], int(widths[field])))
            field += 1
            if name not in cols:
                cols[name] = np.empty((s, obs_width), dtype=target)
            continue
        where.append(None)
        cols[name] = np.empty((s if state_level else n,) + tuple(tails.get(name, ())),
                              dtype=stored if name in _FLAGS else target)
    steps_plan = [(name, key.encode("utf-8"), stored, state_level, at)
                  for (name, key, stored, _, state_level), at in zip(plan, where)]
    fid = h5.id
    whole = metas[ids[0]].convention == "T+1" if ids else True   # per-step keys hold T rows
    t_row = s_row = 0
    for e, T in zip(ids, steps):
        gid = h5py.h5g.open(fid, groups[e].encode("utf-8"))
        links = gid.links
        for name, raw, stored, state_level, at in steps_plan:
            if links.get_info(raw).type != _HARD:
                raise _Refused
            dsid = h5py.h5d.open(gid, raw)
            rows = T + 1 if state_level else T
            if whole or state_level:
                # the plan saw exactly these rows: read them all (HDF5 refuses the read if
                # the file's extent no longer holds as many values as the buffer)
                fspace, dims = h5py.h5s.ALL, None
            else:
                fspace = dsid.get_space()
                dims = fspace.shape
                if not dims or dims[0] < rows:
                    raise _Refused
                if dims[0] != rows:
                    fspace.select_hyperslab((0,) * len(dims), (rows,) + tuple(dims[1:]))
            arr = cols[name]
            if at is not None:               # an observation field: its columns of the rows
                c0, w = at
                buf = arr[s_row:s_row + rows]
                mspace = h5py.h5s.create_simple((rows, obs_width))
                if w != obs_width:
                    mspace.select_hyperslab((0, c0), (rows, w))
            else:
                a = s_row if state_level else t_row
                buf = arr[a:a + rows]
                mspace = h5py.h5s.create_simple(buf.shape)
            if _direct(stored, buf.dtype):
                # HDF5 refuses the read if the file's selection does not hold as many values
                dsid.read(mspace, fspace, buf, mtype=memory_type(buf.dtype))
            else:
                tmp = np.empty(mspace.shape if at is None else (rows, at[1]), dtype=stored)
                dsid.read(h5py.h5s.create_simple(tmp.shape), fspace, tmp, mtype=memory_type(stored))
                if at is not None:
                    buf[:, at[0]:at[0] + at[1]] = tmp.reshape(rows, at[1])
                else:
                    buf[...] = tmp.reshape(buf.shape)
        t_row += T
        s_row += T + 1
    for name in _FLAGS:
        value = cols.get(name)
        if value is not None and value.dtype.kind != "b":
            if ((value != 0) & (value != 1)).any():
                raise _Refused                # the general path names the episode and step
            cols[name] = value != 0
    if layout.keys.task is not None:
        cols["task_ids"] = np.asarray([metas[e].task for e in ids], dtype=np.int64)
    return cols


_FLAGS = tuple(name for _, name in FLAG_COLUMNS)

