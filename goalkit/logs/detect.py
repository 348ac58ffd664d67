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
    "task_goal": ("goal", "goals", "task_goal", "target", "goal_pos", "target_pos"),
    "termination": ("terminated", "terminateds", "term", "terms", "termination", "terminations",
                    "terminal", "terminals"),
    "time_limit": ("truncated", "truncateds", "trunc", "truncs", "truncation", "truncations",
                   "time_limit", "time_limits", "timelimit", "timelimits"),
}
#: Boundary kind -> names looked for, in the order the kinds are preferred. Without a done
#: array, the termination and time-limit flags found are the done flags (OR-ed).
BOUNDARY_NAMES = {
    "offsets": ("offsets", "episode_offsets", "episode_starts", "episode_start", "starts"),
    "episode_id": ("episode_id", "episode_ids", "episode", "episode_index", "ep", "ids", "run_id",
                   "traj_id", "trajectory_id", "episode_idx"),
    "done": ("done", "dones", "episode_end", "ends"),
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


# ---- partial layouts: when detection cannot decide ---------------------------------------------
#: Most arrays listed in a partial layout.
MAX_LISTED = 200
#: Roles a partial layout makes a guess for, in the order written.
GUESS_ROLES = ("observation", "next_observation", "action", "reward", "success", "task", "frame",
               "task_goal", "termination", "time_limit")


def _h5_arrays(h5, max_depth: int = 4) -> list[tuple[str, tuple, str]]:
    """``(path, shape, dtype)`` of the datasets in an HDF5 file, breadth first, natural order.

    Links are looked at first (external and broken links are skipped); at most MAX_LISTED.
    """
    import h5py

    out, level = [], [("", h5)]
    for _ in range(max_depth):
        nxt = []
        for path, group in level:
            for name in natural_sorted(group.keys()):
                try:
                    obj = linked(group, name, h5.filename)
                except LogError:
                    continue
                sub = f"{path}/{name}" if path else name
                if isinstance(obj, h5py.Dataset):
                    out.append((sub, tuple(int(n) for n in obj.shape), str(obj.dtype)))
                elif isinstance(obj, h5py.Group):
                    nxt.append((sub, obj))
                if len(out) >= MAX_LISTED:
                    return out
        level = nxt
    return out


def _guess_roles(arrays: list[tuple[str, tuple, str]]) -> dict:
    """Role -> (key, why) guesses from names, then from shapes for the required roles."""
    by_base = {}
    for path, shape, dtype in arrays:
        by_base.setdefault(path.rsplit("/", 1)[-1], (path, shape, dtype))
    guesses = {}
    for role in GUESS_ROLES:
        name = _pick(list(by_base), ROLE_NAMES[role])
        if name is not None:
            guesses[role] = (by_base[name][0], "by its name")
    used = {k for k, _ in guesses.values()}
    numeric = [(p, s, d) for p, s, d in arrays if p not in used and len(s) in (1, 2)
               and np.dtype(d).kind in "iuf"]
    if "observation" not in guesses:
        floats = [a for a in numeric if np.dtype(a[2]).kind == "f" and len(a[1]) == 2]
        if floats:
            best = max(floats, key=lambda a: (a[1][1], a[1][0]))
            guesses["observation"] = (best[0], "by its shape: the widest float array")
            used.add(best[0])
    if "action" not in guesses:
        obs = next((a for a in arrays if a[0] == guesses.get("observation", ("",))[0]), None)
        rows = {obs[1][0], obs[1][0] - 1} if obs is not None else set()
        cands = [a for a in numeric if a[0] not in used and np.dtype(a[2]).kind == "f" and a[1]
                 and (not rows or a[1][0] in rows)]
        if cands:
            best = min(cands, key=lambda a: (a[1][1] if len(a[1]) == 2 else 1, a[0]))
            guesses["action"] = (best[0], "by its shape: a float array with as many rows, narrower")
    return guesses


def _boundary_guess(arrays) -> tuple[str, list, str] | None:
    """(kind, keys, why) for a flat log's boundaries, or None."""
    names = {p.rsplit("/", 1)[-1]: p for p, _, _ in arrays}
    for kind, wanted in BOUNDARY_NAMES.items():
        name = _pick(list(names), wanted)
        if name is not None:
            return kind, [names[name]], "by its name"
    flags = [names[n] for r in ("termination", "time_limit") for n in [_pick(list(names), ROLE_NAMES[r])]
             if n is not None]
    if flags:
        return "done", flags, "the termination and time-limit flags, OR-ed"
    ints = [p for p, s, d in arrays if len(s) == 1 and np.dtype(d).kind in "iu"]
    if ints:
        return "episode_id", ints[:1], "by its shape: a 1-D integer array (check: a new episode where it changes)"
    bools = [p for p, s, d in arrays if len(s) == 1 and np.dtype(d).kind == "b"]
    if bools:
        return "done", bools, "by its dtype: 1-D bool arrays (check: true on each episode's last row)"
    return None


def found_arrays(path) -> tuple[str, str, list, str | None]:
    """Every array in a log (HDF5, ``.npz``, a folder of per-episode ``.npz``), with shape and dtype.

    Parameters
    ----------
    path : str or Path
        The log.

    Returns
    -------
    shape : str
        The storage shape it looks like: ``"grouped"`` (several episode groups), ``"flat"`` or
        ``"per-file"``.
    where : str
        Where the arrays were listed ("in the file", "in episode group runs/r0 (paths inside it)").
    arrays : list of (str, tuple, str)
        ``(key, shape, dtype)`` in natural order, at most :data:`MAX_LISTED`; for ``grouped`` the
        keys are paths inside the first episode group, for ``per-file`` arrays of the first file.
    episode_groups : str or None
        The episode-group pattern (``grouped`` only).
    """
    path = str(path)
    episode_groups = None
    if os.path.isdir(path):
        names = natural_sorted(n for n in os.listdir(path) if n.lower().endswith(".npz"))
        shape, where = "per-file", f"in {names[0]}" if names else "in the folder"
        arrays = []
        if names:
            acc = NpzAccess(NpzArrays(os.path.join(path, names[0])))
            arrays = [(n, tuple(acc.shape(n)), str(acc.dtype(n))) for n in natural_sorted(acc.names())]
    elif is_npz(path):
        acc = NpzAccess(NpzArrays(path))
        arrays = [(n, tuple(acc.shape(n)), str(acc.dtype(n))) for n in natural_sorted(acc.names())]
        shape, where = "flat", "in the .npz"
    else:
        with open_h5(path) as h5, guard(path, what="cannot read the log"):
            arrays = _h5_arrays(h5)
            episodes = _episode_groups(h5)
            pattern = _pattern(h5, episodes, match_groups) if episodes else None
            if pattern is not None and len(episodes) > 1:
                shape, episode_groups = "grouped", pattern
                first = episodes[0]
                arrays = [(p[len(first) + 1:], s, d) for p, s, d in arrays if p.startswith(first + "/")]
                where = f"in episode group {first} (paths inside it)"
            else:
                shape, where = "flat", "in the file"
    return shape, where, arrays, episode_groups


def partial_layout(path, reason: str = "") -> str:
    """A layout to finish by hand: every array found, with its shape and dtype, and a guess per role.

    Written by ``goalkit scan LOGS --write-layout FILE`` when :func:`propose_layout` cannot decide.
    Roles with a guess are set (with the reason as a comment); the others are commented out with
    ``"???"`` for the user to fill in. The text is TOML that :func:`parse_layout` reads once the
    required roles are filled in.

    Parameters
    ----------
    path : str or Path
        An HDF5 file, a ``.npz`` file or a directory of ``.npz`` files.
    reason : str
        Why detection could not decide (written at the top).

    Returns
    -------
    str or None
        None when no array was found (nothing to list).
    """
    path = str(path)
    shape, where, arrays, episode_groups = found_arrays(path)
    if not arrays:
        return None
    guesses = _guess_roles(arrays)
    lines = [f"# A partial layout for {os.path.basename(path)}: goalkit could not decide all of it"
             + (f" ({reason})" if reason else "") + ".",
             "# Check every guess, fill in the lines marked ???, then check the logs with:",
             f"#   goalkit scan {os.path.basename(path)} --layout THIS_FILE",
             "# A key may take some columns of an array: {key = \"state\", columns = [14, 15, 16]}",
             "# (docs/layout.md). Arrays found " + where + " (key, shape, dtype):"]
    width = max([len(p) for p, _, _ in arrays] + [3])
    lines += [f"#   {p:<{width}}  {str(s):<16} {d}" for p, s, d in arrays]
    if len(arrays) >= MAX_LISTED:
        lines.append(f"#   ... (the first {MAX_LISTED})")
    lines += ["", "version = 1", f"shape = \"{shape}\""]
    if episode_groups is not None:
        lines.append(f"episode_groups = \"{episode_groups}\"")
    lines += ["", "[keys]"]
    required = ("observation", "action")
    for role in GUESS_ROLES:
        if role in guesses:
            key, why = guesses[role]
            lines.append(f"{role} = \"{key}\"    # guess: {why}")
        elif role in required:
            lines.append(f"# {role} = \"???\"    # required: not found (names looked for: "
                         f"{', '.join(ROLE_NAMES[role][:8])}, ...)")
        else:
            lines.append(f"# {role} = \"???\"    # optional")
    if shape == "flat":
        lines += ["", "[boundaries]"]
        b = _boundary_guess(arrays)
        if b is None:
            lines.append("# episode_id = \"???\"    # one of episode_id, done (a key or a list), offsets; "
                         "several may be given")
        else:
            kind, keys, why = b
            value = f"\"{keys[0]}\"" if len(keys) == 1 else "[" + ", ".join(f"\"{k}\"" for k in keys) + "]"
            lines.append(f"{kind} = {value}    # guess: {why}")
    return "\n".join(lines) + "\n"
