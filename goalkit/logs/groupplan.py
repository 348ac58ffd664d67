"""Planning episode groups of a grouped HDF5 log with h5py's low-level calls.

:func:`plan_group` gives the :class:`~goalkit.logs.episodic.EpisodeMeta` that
:func:`~goalkit.logs.episodic.plan_episode` would, opening each dataset of the group once for
its shape and dtype, for layouts whose keys are plain names inside the group. Anything unusual
-- a missing key, a link, a shape, dtype or size it would refuse -- returns None, and the caller
plans that group with ``plan_episode``, which names the problem as it always has.
"""

from __future__ import annotations

import h5py
import numpy as np

from goalkit.logs import checks
from goalkit.logs.access import READ_ERRORS, memory_type
from goalkit.logs.columns import ColumnKey
from goalkit.logs.episodic import EpisodeMeta

_HARD = h5py.h5l.TYPE_HARD


class _Refused(Exception):
    """This group is left to the general planning."""


def plan_keys(layout):
    """The keys :func:`plan_group` looks at, in :func:`~goalkit.logs.episodic.plan_episode`'s
    order, or None when this layout is left to the general planning (column keys, paths,
    next observations)."""
    k = layout.keys
    if k.next_observation is not None:
        return None
    keys = [k.action] + list(layout.observation_keys())
    keys += [getattr(k, r) for r in _STEP_ROLES if getattr(k, r) is not None]
    if k.frame is not None:
        keys.append(k.frame)
    if k.task is not None:
        keys.append(k.task)
    for key in keys:
        if isinstance(key, ColumnKey) or "/" in key:
            return None
    return keys


_STEP_ROLES = ("reward", "success", "termination", "time_limit", "task_goal")


def plan_group(gid, prefix: str, layout, episode: int, seen, fileno: int, file_size,
               max_rows: int, max_row_values: int, max_width: int, max_attr_values: int, types=None):
    """One episode group's plan with low-level calls, or None to leave it to the general planning.

    Returns ``(EpisodeMeta, {key: stored dtype})`` when every check that
    :func:`~goalkit.logs.episodic.plan_episode` makes passes (the same meta it would return);
    None on anything unusual -- a missing key, a link, a shape or dtype it would refuse, a
    limit -- so that the general planning names the problem as it always has.

    ``types`` (a dict shared by the calls of one scan) keeps each key's last HDF5 type and its
    numpy dtype: an equal type (``H5Tequal``) has the same dtype, found without converting again.
    """
    try:
        return _plan_group(gid, prefix, layout, episode, seen, fileno, file_size, max_rows,
                           max_row_values, max_width, max_attr_values, {} if types is None else types)
    except (_Refused, *READ_ERRORS):
        return None


def _plan_group(gid, prefix, layout, episode, seen, fileno, file_size, max_rows, max_row_values, max_width,
                max_attr_values, types):
    k = layout.keys
    links = gid.links
    info = {}

    def look(key):
        raw = key.encode("utf-8")
        link = links.get_info(raw)
        if link.type != _HARD:
            raise _Refused
        if seen.claim((fileno, link.u), episode) is not None:
            raise _Refused
        dsid = h5py.h5d.open(gid, raw)
        dims = dsid.shape
        tid = dsid.get_type()
        known = types.get(key)
        if known is not None and known[0].equal(tid):
            dtype = known[1]
        else:
            dtype = tid.dtype
            types[key] = (tid, dtype)
        if not dims:
            raise _Refused
        per_row = 1
        for d in dims[1:]:
            per_row *= int(d)
        if not (0 < per_row <= max_row_values and dims[0] <= max_rows
                and (file_size is None or dims[0] * per_row * dtype.itemsize <= file_size)):
            raise _Refused
        info[key] = dtype
        return dims, dtype

    def rows_2d(dims):
        if len(dims) == 1:
            return int(dims[0]), 1
        if len(dims) == 2 and 1 <= dims[1] <= max_width:
            return int(dims[0]), int(dims[1])
        raise _Refused

    dims, a_dtype = look(k.action)
    if a_dtype.kind not in "iuf":
        raise _Refused
    n, a_width = rows_2d(dims)
    widths, dtypes, m0 = [], [], None
    for key in layout.observation_keys():
        dims, dt = look(key)
        if dt.kind not in "iuf":
            raise _Refused
        m, w = rows_2d(dims)
        if m0 is not None and m != m0:
            raise _Refused
        m0 = m
        widths.append(w)
        dtypes.append(np.dtype(dt))
    if m0 == n + 1:
        convention, steps = "T+1", n
    elif m0 == n:
        convention, steps = "T", n - 1
    else:
        raise _Refused
    if steps <= 0:
        raise _Refused
    goal_width = None
    for role in _STEP_ROLES:
        key = getattr(k, role)
        if key is None:
            continue
        dims, dt = look(key)
        if dt.kind not in ("biuf" if role in ("success", "termination", "time_limit") else "iuf"):
            raise _Refused
        rows, width = rows_2d(dims)
        if rows != n or (role != "task_goal" and width != 1):
            raise _Refused
        if role == "task_goal":
            goal_width = width
    frame_shape = None
    if k.frame is not None:
        dims, dt = look(k.frame)
        if dt != np.uint8 or len(dims) not in (3, 4) or dims[0] != steps + 1:
            raise _Refused
        frame_shape = tuple(int(s) for s in dims[1:])
    task = None
    if k.task is not None:
        raw = k.task.encode("utf-8")
        if links.exists(raw) or not h5py.h5a.exists(gid, raw):
            raise _Refused                   # a task dataset, or no attribute: the general path
        aid = h5py.h5a.open(gid, raw)
        shape, dt = aid.shape, aid.dtype
        size = 1
        for d in shape:
            size *= int(d)
        if size > max_attr_values or dt.kind not in "iuf" or dt.shape:
            raise _Refused
        value = np.empty(shape, dtype=dt)
        if value.size:
            aid.read(value, mtype=memory_type(dt))
        try:
            task = checks.task_value(value[()] if value.ndim == 0 else value, file="", key=k.task, episode=episode)
        except Exception:                    # noqa: BLE001  the general path names it
            raise _Refused from None
    meta = EpisodeMeta(steps=steps, convention=convention, obs_widths=tuple(widths), obs_dtypes=tuple(dtypes),
                     action_width=a_width, action_dtype=np.dtype(a_dtype), goal_width=goal_width,
                     frame_shape=frame_shape, task=task)
    return meta, info
