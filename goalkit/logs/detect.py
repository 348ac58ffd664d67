"""Propose a layout for logs without one, from the storage shape and common key names.

Recognised shapes: an HDF5 file with one group per episode (found as the groups holding an
action-like dataset), a flat HDF5 file or ``.npz`` with an episode-id, done-flag or offsets
array, and a directory of per-episode ``.npz`` files. Keys are matched to roles by common
names (case-insensitive). When a choice cannot be made, a LayoutError says what was missing
and which names were looked for, so the user can write the layout by hand.
"""

from __future__ import annotations

import fnmatch
import itertools
import os

import numpy as np

from goalkit.errors import LayoutError, LogError
from goalkit.logs.access import H5Access, NpzAccess, guard, open_h5
from goalkit.logs.flat import is_npz
from goalkit.logs.grouped import linked, match_groups
from goalkit.logs.layout import Layout, parse_layout
from goalkit.logs.limits import regular_file
from goalkit.logs.naming import natural_sorted
from goalkit.logs.npzfile import NpzArrays

#: Role -> names looked for, best first (all compared in lower case).
ROLE_NAMES = {
    "observation": ("obs", "observation", "observations", "state", "states", "ob", "obs_t", "s_t",
                    "proprio", "robot_state"),
    "next_observation": ("next_obs", "next_observation", "next_observations", "next_state",
                         "next_states", "obs_next", "next_ob", "new_obs", "obs2", "obs_tp1", "s_next",
                         "s_tp1", "state_next", "next_obs_t"),
    "action": ("act", "action", "actions", "acts", "ctrl", "ctrls", "control", "controls", "u",
               "command", "commands", "a_t"),
    "reward": ("rew", "reward", "rewards", "rews", "r_t"),
    "success": ("success", "successes", "is_success", "succeeded", "solved", "goal_reached"),
    "task": ("task", "task_id", "task_ids", "task_index", "task_idx"),
    "frame": ("frame", "frames", "image", "images", "rgb", "camera", "cam", "pixels", "img", "imgs"),
    "task_goal": ("goal", "goals", "task_goal", "target", "desired_goal", "goal_pos", "target_pos"),
    "termination": ("terminated", "terminateds", "term", "terms", "termination", "terminations",
                    "terminal", "terminals", "is_terminal"),
    "time_limit": ("truncated", "truncateds", "trunc", "truncs", "truncation", "truncations", "timeout",
                   "timeouts", "time_limit", "time_limits", "timelimit", "timelimits"),
}
#: Boundary kind -> names looked for, in the order the kinds are preferred. Without a done
#: array, the termination and time-limit flags found are the done flags (OR-ed).
BOUNDARY_NAMES = {
    "offsets": ("offsets", "episode_offsets", "episode_starts", "episode_start", "starts"),
    "episode_id": ("episode_id", "episode_ids", "episode", "episode_index", "ep", "ids", "run_id",
                   "traj_id", "trajectory_id", "episode_idx"),
    "done": ("done", "dones", "episode_end", "is_last", "ends"),
}


def _pick(names, wanted):
    """The first of ``wanted`` found among ``names`` (case-insensitive), as spelt in names."""
    lower = {n.lower(): n for n in natural_sorted(names)}
    for w in wanted:
        if w in lower:
            return lower[w]
    return None


def _roles(arrays: list[str], groups: list[str] = ()) -> dict:
    """Match array names to roles; returns role -> name."""
    found = {}
    for role, wanted in ROLE_NAMES.items():
        name = _pick(arrays, wanted)
        if name is not None:
            found[role] = name
    if "observation" not in found:
        group = _pick(groups, ROLE_NAMES["observation"])
        if group is not None:
            found["observation_group"] = group
    return found


def _state_fields(acc, roles: dict) -> dict | None:
    """Unassigned numeric 1-D/2-D arrays with one row more than the actions, as fields."""
    used = set(roles.values())
    try:
        n = acc.shape(roles["action"])[0]
    except (KeyError, IndexError):
        return None
    found = {}
    for name in natural_sorted(acc.names()):
        if name in used:
            continue
        shape, dtype = acc.shape(name), acc.dtype(name)
        if len(shape) in (1, 2) and shape[0] == n + 1 and np.dtype(dtype).kind in "iuf":
            found[name] = name
    return found or None


def _what_found(names) -> str:
    names = natural_sorted(names)
    more = f" (+{len(names) - 12} more)" if len(names) > 12 else ""
    return (", ".join(names[:12]) + more) if names else "nothing"


def _keys_table(roles: dict, path, where: str, fields=None) -> dict:
    if "action" not in roles:
        raise LayoutError(f"could not find the actions {where}: expected an array named one of "
                          f"{', '.join(ROLE_NAMES['action'])}; write a layout with [keys] action",
                          file=path, key="keys.action")
    keys = {r: n for r, n in roles.items() if r in ROLE_NAMES}
    if "observation" not in keys and not fields:
        raise LayoutError(f"could not find the observations {where}: expected an array (or a group "
                          f"of arrays) named one of {', '.join(ROLE_NAMES['observation'])}; write a "
                          f"layout with [keys] observation or [fields]", file=path, key="keys.observation")
    if "next_observation" in keys and "observation" not in keys:
        del keys["next_observation"]
    return keys


def propose_layout(path) -> Layout:
    """Propose a layout for the logs at ``path``.

    Parameters
    ----------
    path : str or Path
        An HDF5 file, a ``.npz`` file or a directory of ``.npz`` files.

    Returns
    -------
    Layout

    Raises
    ------
    LayoutError
        When the shape or a required role (actions, observations, flat boundaries) cannot be
        decided; the message lists what was looked for and what was found.
    LogError
        When the path is missing or unreadable.
    """
    path = str(path)
    if os.path.isdir(path):
        return _per_file(path)

    regular_file(path, what="an HDF5 file, an .npz file or a directory of .npz files")

    if is_npz(path):
        return _flat(path, NpzArrays(path).keys(), "in the .npz")
    return _hdf5(path)


def _per_file(path) -> Layout:
    names = [n for n in os.listdir(path) if fnmatch.fnmatchcase(n, "*.npz")]
    if not names:
        raise LayoutError(f"could not decide the shape: the directory holds no .npz files (found: "
                          f"{_what_found(os.listdir(path))}); expected per-episode .npz files",
                          file=path, key="file_pattern")

    first = os.path.join(path, natural_sorted(names)[0])
    acc = NpzAccess(NpzArrays(first))
    roles = _roles(acc.names())
    fields = _state_fields(acc, roles) if "observation" not in roles else None
    keys = _keys_table(roles, first, "in the episode file", fields)
    doc = {"shape": "per-file", "file_pattern": "*.npz", "keys": keys}
    if fields:
        doc["fields"] = fields
    return parse_layout(doc, path)


def _flat(path, arrays, where, prefix="") -> Layout:
    roles = _roles(arrays)
    keys = _keys_table(roles, path, where)
    boundary = None
    for kind, wanted in BOUNDARY_NAMES.items():
        name = _pick(arrays, wanted)
        if name is not None:
            boundary = {kind: prefix + name}
            break
    flags = [keys[r] for r in ("termination", "time_limit") if r in keys]
    if boundary is None and flags:                 # the environment's own end flags, OR-ed
        boundary = {"done": [prefix + n for n in flags]}
    if boundary is None:
        looked = "; ".join(f"{k}: {', '.join(v)}" for k, v in BOUNDARY_NAMES.items())
        raise LayoutError(f"could not find episode boundaries {where} (found: {_what_found(arrays)}); "
                          f"expected an array named ({looked}); write a layout with [boundaries]",
                          file=path, key="boundaries")
    keys = {r: prefix + n for r, n in keys.items()}
    return parse_layout({"shape": "flat", "keys": keys, "boundaries": boundary}, path)


def _hdf5(path) -> Layout:
    import h5py

    with open_h5(path) as h5, guard(path, what="cannot read the log"):
        root_arrays = _members(h5, path, h5py.Dataset)
        if _pick(root_arrays, ROLE_NAMES["action"]) is not None:
            return _flat(path, root_arrays, "at the top level")
        subgroups = _members(h5, path, h5py.Group)
        if not root_arrays and len(subgroups) == 1:
            inner = h5[subgroups[0]]
            inner_arrays = _members(inner, path, h5py.Dataset)
            if _pick(inner_arrays, ROLE_NAMES["action"]) is not None:
                return _flat(path, inner_arrays, f"in group {subgroups[0]}", prefix=subgroups[0] + "/")
        episodes = _episode_groups(h5)
        if not episodes:
            raise LayoutError(f"could not decide the shape: no top-level action array and no groups "
                              f"holding one (looked for {', '.join(ROLE_NAMES['action'])}; top level: "
                              f"{_what_found(h5.keys())})", file=path, key="shape")
        pattern = _pattern(h5, episodes, match_groups)
        if pattern is None:
            raise LayoutError(f"could not find one pattern for the episode groups (e.g. "
                              f"{', '.join(episodes[:3])}); write a layout with episode_groups",
                              file=path, key="episode_groups")
        g = h5[episodes[0]]
        arrays = _members(g, path, h5py.Dataset)
        groups = _members(g, path, h5py.Group)
        roles = _roles(arrays, groups)
        fields = None
        if "observation_group" in roles:
            og = g[roles["observation_group"]]
            names = natural_sorted(_members(og, path, h5py.Dataset))
            fields = {n: f"{roles['observation_group']}/{n}" for n in names}
        if fields is None and "observation" not in roles and "action" in roles:
            fields = _state_fields(H5Access(g, path), roles)
        if "task" not in roles:
            attr = _pick(list(g.attrs.keys()), ROLE_NAMES["task"])
            if attr is not None:
                roles["task"] = attr
        keys = _keys_table(roles, path, f"in episode group {episodes[0]}", fields)
        doc = {"shape": "grouped", "episode_groups": pattern, "keys": keys}
        if fields:
            doc["fields"] = fields
        return parse_layout(doc, path)


def _members(group, file, kind) -> list[str]:
    """Names in ``group`` of objects of ``kind`` (h5py.Dataset or h5py.Group); links are looked
    at first (an external link or a soft link that does not resolve is refused by name)."""
    return [n for n in group.keys() if isinstance(linked(group, n, file), kind)]


def _episode_groups(h5, max_depth: int = 4) -> list[str]:
    """Paths of groups directly holding an action-like dataset (searched to ``max_depth``)."""
    import h5py

    found, level = [], [("", h5)]
    for _ in range(max_depth):
        nxt = []
        for path, group in level:
            for name in natural_sorted(group.keys()):
                obj = linked(group, name, h5.filename)
                if not isinstance(obj, h5py.Group):
                    continue
                sub = f"{path}/{name}" if path else name
                arrays = _members(obj, h5.filename, h5py.Dataset)
                if _pick(arrays, ROLE_NAMES["action"]) is not None:
                    found.append(sub)
                else:
                    nxt.append((sub, obj))
        if found:
            return found
        level = nxt
    return found


def _pattern(h5, episodes: list[str], match_groups) -> str | None:
    """A pattern matching exactly the episode groups, or None."""
    split = [p.split("/") for p in episodes]
    if len({len(s) for s in split}) != 1:
        return None
    target = set(episodes)
    choices = []
    for level in range(len(split[0])):
        names = {s[level] for s in split}
        if len(names) == 1 and level < len(split[0]) - 1:
            choices.append([next(iter(names))])
            continue
        prefix = os.path.commonprefix(sorted(names)).rstrip("0123456789")
        options = ["*"] + ([prefix + "*"] if prefix else [])
        choices.append(options)
    # try the plainest pattern first: "*" at every varying level, then prefixes
    for combo in itertools.product(*choices):
        pattern = "/".join(combo)
        if "*" in pattern and set(match_groups(h5, pattern)) == target:
            return pattern
    return None
