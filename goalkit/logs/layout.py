"""The layout file: which of the user's keys plays which role, and how episodes are stored.

See ``docs/layout.md`` for the user documentation and ``docs/internals.md`` for the schema.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from typing import Mapping

from goalkit.config import check_keys, load_toml
from goalkit.errors import LayoutError
from goalkit.logs import recordspec
from goalkit.logs.columns import ColumnKey, base_key, key_to_toml, parse_key_value
from goalkit.logs.recordspec import spec_to_toml
from goalkit.outputs import small_toml

#: The storage shapes a layout can describe.
SHAPES = ("grouped", "flat", "per-file", "bag", "table")
#: Top-level keys of a layout file.
TOP_KEYS = ("version", "shape", "episode_groups", "file_pattern", "keys", "fields", "boundaries",
            "bag", "table")
#: Roles in the ``[keys]`` table.
ROLES = ("observation", "next_observation", "action", "reward", "success", "task", "frame",
         "task_goal", "termination", "time_limit")
#: Roles whose key may take some columns of an array (``{key = "state", columns = [...]}``).
COLUMN_ROLES = ("observation", "next_observation", "task_goal")
#: Roles of the environment's own end-of-episode flags, one per action row (flat, grouped, per-file).
FLAG_ROLES = ("termination", "time_limit")
#: Boundary kinds in the ``[boundaries]`` table (flat shape only).
BOUNDARY_KINDS = ("episode_id", "done", "offsets")
#: The layout-file version this code reads and writes.
VERSION = 1


@dataclass(frozen=True)
class Keys:
    """Role -> key name (a dataset path inside an episode group, an array name in a file).

    Every role is optional except ``action``; ``observation`` may be omitted when the layout
    has ``[fields]``.
    """

    observation: str | None = None
    next_observation: str | None = None
    action: str | None = None
    reward: str | None = None
    success: str | None = None
    task: str | None = None
    frame: str | None = None
    task_goal: str | None = None
    termination: str | None = None
    time_limit: str | None = None

    def items(self) -> list[tuple[str, str]]:
        """Return the ``(role, key)`` pairs that are set, in schema order."""
        return [(r, getattr(self, r)) for r in ROLES if getattr(self, r) is not None]


@dataclass(frozen=True)
class Boundaries:
    """How a flat log marks its episodes: any combination of ids, done flags and offsets.

    An episode ends where any of them ends one: where the id changes, after a row on which any
    of the done flags is true (several flags are OR-ed, e.g. the environment's termination and
    time-limit flags), or at an offset.

    Attributes
    ----------
    episode_id : str or None
        Key of an episode-id array.
    done : tuple of str
        Keys of done flags (empty when none).
    offsets : str or None
        Key of an offsets or start-index array.
    """

    episode_id: str | None = None
    done: tuple = ()
    offsets: str | None = None

    def items(self) -> list[tuple[str, str]]:
        """``(kind, key)`` of every boundary array, in the order ids, done flags, offsets."""
        out = [("episode_id", self.episode_id)] if self.episode_id is not None else []
        out += [("done", key) for key in self.done]
        if self.offsets is not None:
            out.append(("offsets", self.offsets))
        return out

    @property
    def kind(self) -> str:
        """The first boundary kind that is set (``"episode_id"``, ``"done"`` or ``"offsets"``)."""
        return self.items()[0][0]

    @property
    def key(self) -> str:
        """The key of the first boundary array."""
        return self.items()[0][1]

    @property
    def keys_text(self) -> str:
        """Every boundary key joined by ``+``, for messages."""
        return "+".join(key for _, key in self.items())


@dataclass(frozen=True)
class Layout:
    """A parsed, validated layout file.

    Parameters
    ----------
    shape : {"grouped", "flat", "per-file"}
        How episodes are stored.
    keys : Keys
        Role -> key names.
    fields : tuple of (str, str)
        Named observation fields ``(name, key)`` in concatenation order (may be empty).
    episode_groups : str, optional
        Grouped only: pattern of episode group paths, one ``*``-component per nesting level.
    file_pattern : str, optional
        Per-file only: glob of episode files inside the directory.
    boundaries : Boundaries, optional
        Flat only: how episodes are delimited.
    version : int
        Layout-file version.

    Examples
    --------
    >>> lay = parse_layout({"shape": "grouped", "episode_groups": "runs/*",
    ...                     "keys": {"observation": "obs", "action": "act"}}, "layout.toml")
    >>> lay.keys.action, lay.episode_groups
    ('act', 'runs/*')
    """

    shape: str
    keys: Keys
    fields: tuple[tuple[str, str], ...] = ()
    episode_groups: str | None = None
    file_pattern: str | None = None
    boundaries: Boundaries | None = None
    version: int = VERSION
    #: Shapes "bag" and "table": their section (see :mod:`goalkit.logs.recordspec`).
    record: object = None

    def observation_keys(self) -> list[str]:
        """Keys whose arrays, concatenated in order, make the observation vector."""
        if self.fields:
            return [k for _, k in self.fields]
        return [self.keys.observation]

    def next_observation_keys(self) -> list[str]:
        """Keys of the next observations, one per observation key (empty without next_observation).

        With ``[fields]`` (all of one array), each field takes its columns from the
        next_observation array; a column key observation passes its columns on to a plain
        next_observation key.
        """
        nxt = self.keys.next_observation
        if nxt is None:
            return []
        out = []
        for key in self.observation_keys():
            if isinstance(nxt, ColumnKey):
                out.append(nxt)
            elif isinstance(key, ColumnKey):
                out.append(key.with_base(nxt))
            else:
                out.append(nxt)
        return out


def _string(value, *, file, key, what="a non-empty string"):
    if not isinstance(value, str) or not value:
        raise LayoutError(f"expected {what}, got {value!r}", file=file, key=key)
    return value


def _table(doc, name, file) -> Mapping:
    value = doc.get(name, {})
    if not isinstance(value, dict):
        raise LayoutError(f"expected a table [{name}], got {value!r}", file=file, key=name)
    return value


def parse_layout(doc: Mapping, file="<layout>") -> Layout:
    """Check a layout document (a parsed TOML table) and return it as a :class:`Layout`.

    Parameters
    ----------
    doc : mapping
        The parsed TOML document.
    file : str or Path
        Where it came from, for messages.

    Returns
    -------
    Layout

    Raises
    ------
    LayoutError
        On unknown or misspelt keys (listing the valid ones and the closest), a wrong shape,
        missing required keys, or keys that do not belong to the chosen shape.
    """
    file = str(file)
    if not isinstance(doc, Mapping):
        raise LayoutError(f"expected a TOML table, got {type(doc).__name__}", file=file)
    check_keys(doc, TOP_KEYS, file=file, section="the layout's top level", error=LayoutError)
    version = doc.get("version", VERSION)
    if isinstance(version, bool) or not isinstance(version, int) or version != VERSION:
        raise LayoutError(f"expected version = {VERSION}, got {version!r}", file=file, key="version")
    if "shape" not in doc:
        raise LayoutError(f"missing 'shape'; expected one of {', '.join(SHAPES)}", file=file, key="shape")
    shape = doc["shape"]
    if shape not in SHAPES:
        hint = f"expected one of {', '.join(SHAPES)}, got {shape!r}"
        raise LayoutError(hint, file=file, key="shape")

    keys_t = _table(doc, "keys", file)
    check_keys(keys_t, ROLES, file=file, section="[keys]", error=LayoutError)
    columns_ok = shape not in ("bag", "table")
    keys = Keys(**{r: parse_key_value(v, file=file, key=f"keys.{r}", allow_columns=columns_ok and r in COLUMN_ROLES)
                   for r, v in keys_t.items()})

    fields_t = _table(doc, "fields", file)
    field_pairs = tuple((str(n), parse_key_value(v, file=file, key=f"fields.{n}", allow_columns=columns_ok))
                        for n, v in fields_t.items())

    if keys.action is None:
        raise LayoutError("missing the action key; expected [keys] action = \"...\"", file=file,
                          key="keys.action")
    if keys.observation is None and not field_pairs:
        raise LayoutError("no observations: expected [keys] observation = \"...\" or a [fields] table",
                          file=file, key="keys.observation")
    if keys.observation is not None and field_pairs:
        raise LayoutError("expected either [keys] observation or a [fields] table, not both",
                          file=file, key="fields")
    if shape in ("bag", "table"):
        for role in FLAG_ROLES:
            if getattr(keys, role) is not None:
                raise LayoutError(f"the {role} role is read from flat, grouped and per-file logs; "
                                  f"shape = \"{shape}\" does not carry it", file=file, key=f"keys.{role}")
    if keys.next_observation is not None and field_pairs:
        bases = sorted({base_key(k) for _, k in field_pairs})
        if len(bases) != 1:
            raise LayoutError(f"next_observation with [fields] needs every field to take its columns from one "
                              f"array (the observation array); the fields read {', '.join(bases)}", file=file,
                              key="keys.next_observation")
        if isinstance(keys.next_observation, ColumnKey):
            raise LayoutError("with [fields], give next_observation as the array's key: each field takes its "
                              "own columns from it", file=file, key="keys.next_observation")
    if (isinstance(keys.next_observation, ColumnKey) and isinstance(keys.observation, ColumnKey)
            and len(keys.next_observation.columns) != len(keys.observation.columns)):
        raise LayoutError(f"selects {len(keys.next_observation.columns)} columns, observation selects "
                          f"{len(keys.observation.columns)}; expected the same number", file=file,
                          key="keys.next_observation")

    def only(name, allowed_shape):
        if name in doc and shape != allowed_shape:
            raise LayoutError(f"'{name}' is only for shape = \"{allowed_shape}\", this layout has "
                              f"shape = \"{shape}\"", file=file, key=name)

    only("episode_groups", "grouped")
    only("file_pattern", "per-file")
    only("boundaries", "flat")
    only("bag", "bag")
    only("table", "table")

    episode_groups = file_pattern = boundaries = None
    if shape == "grouped":
        if "episode_groups" not in doc:
            raise LayoutError("missing 'episode_groups'; expected a pattern such as \"runs/*\"",
                              file=file, key="episode_groups")
        episode_groups = _string(doc["episode_groups"], file=file, key="episode_groups",
                                 what="a group pattern such as \"runs/*\"")
        parts = episode_groups.strip("/").split("/")
        if any(p == "" for p in parts) or "*" not in episode_groups:
            raise LayoutError(f"expected a group pattern with '*' components such as \"runs/*\", "
                              f"got {episode_groups!r}", file=file, key="episode_groups")
        named = [(f"keys.{r}", k) for r, k in keys.items()] + [(f"fields.{n}", k) for n, k in field_pairs]
        for name, key in named:
            if key.startswith("/"):
                raise LayoutError(f"expected a path inside each episode group, got the absolute path "
                                  f"{key!r}: every episode would read the same dataset", file=file,
                                  key=name)
    elif shape == "per-file":
        file_pattern = _string(doc.get("file_pattern", "*.npz"), file=file, key="file_pattern",
                               what="a glob such as \"*.npz\"")
        if "/" in file_pattern:
            raise LayoutError(f"expected a file-name glob without '/', got {file_pattern!r}",
                              file=file, key="file_pattern")
    elif shape in ("bag", "table"):
        parse = recordspec.parse_bag if shape == "bag" else recordspec.parse_table
        if shape == "table" and "table" not in doc:
            raise LayoutError("missing [table]; expected episode_column = \"...\"", file=file, key="table")
        record = parse(doc.get(shape, {}), file)
        return Layout(shape=shape, keys=keys, fields=field_pairs, record=record, version=version)
    else:
        boundaries = _boundaries(_table(doc, "boundaries", file), file)
    return Layout(shape=shape, keys=keys, fields=field_pairs, episode_groups=episode_groups,
                  file_pattern=file_pattern, boundaries=boundaries, version=version)


def _boundaries(b_t: Mapping, file) -> Boundaries:
    """Check a ``[boundaries]`` table: any of episode_id, done (a key or a list), offsets."""
    check_keys(b_t, BOUNDARY_KINDS, file=file, section="[boundaries]", error=LayoutError)
    if not b_t:
        raise LayoutError(f"expected at least one of {', '.join(BOUNDARY_KINDS)} in [boundaries]",
                          file=file, key="boundaries")
    done = b_t.get("done", ())
    if isinstance(done, str):
        done = (done,)
    if not isinstance(done, (list, tuple)) or "done" in b_t and not done:
        raise LayoutError(f"expected a key or a non-empty list of keys, got {b_t['done']!r}", file=file,
                          key="boundaries.done")
    done = tuple(_string(d, file=file, key="boundaries.done") for d in done)
    if len(set(done)) != len(done):
        raise LayoutError(f"expected each done key once, got {list(done)}", file=file, key="boundaries.done")
    single = {k: _string(b_t[k], file=file, key=f"boundaries.{k}") for k in ("episode_id", "offsets") if k in b_t}
    return Boundaries(done=done, **single)


def load_layout(path) -> Layout:
    """Read and check a layout file.

    Parameters
    ----------
    path : str or Path
        The TOML file.

    Returns
    -------
    Layout
    """
    return parse_layout(load_toml(path, LayoutError), path)


_BARE = re.compile(r"^[A-Za-z0-9_-]+$")


def _tstr(s: str) -> str:
    return json.dumps(s, ensure_ascii=False)


def _tkey(s: str) -> str:
    return s if _BARE.match(s) else _tstr(s)


def layout_to_toml(layout: Layout) -> str:
    """Render a layout as TOML text that :func:`parse_layout` reads back to an equal Layout.

    Examples
    --------
    >>> lay = parse_layout({"shape": "flat", "keys": {"observation": "obs", "action": "act"},
    ...                     "boundaries": {"done": "done"}})
    >>> parse_layout(__import__("tomllib").loads(layout_to_toml(lay))) == lay
    True
    """
    lines = [f"version = {layout.version}", f"shape = {_tstr(layout.shape)}"]
    if layout.episode_groups is not None:
        lines.append(f"episode_groups = {_tstr(layout.episode_groups)}")
    if layout.file_pattern is not None:
        lines.append(f"file_pattern = {_tstr(layout.file_pattern)}")
    lines += ["", "[keys]"]
    lines += [f"{role} = {key_to_toml(key, _tstr)}" for role, key in layout.keys.items()]
    if layout.fields:
        lines += ["", "[fields]"]
        lines += [f"{_tkey(name)} = {key_to_toml(key, _tstr)}" for name, key in layout.fields]
    if layout.boundaries is not None:
        b = layout.boundaries
        lines += ["", "[boundaries]"]
        if b.episode_id is not None:
            lines.append(f"episode_id = {_tstr(b.episode_id)}")
        if len(b.done) == 1:
            lines.append(f"done = {_tstr(b.done[0])}")
        elif b.done:
            lines.append(f"done = [{', '.join(_tstr(d) for d in b.done)}]")
        if b.offsets is not None:
            lines.append(f"offsets = {_tstr(b.offsets)}")
    if layout.record is not None:
        lines += spec_to_toml(layout.record)
    return "\n".join(lines) + "\n"


def is_layout_file(path) -> bool:
    """True when ``path`` is a small TOML file with a layout's keys only, ``shape`` among them.

    The test that lets ``--replace`` replace an existing layout file (``scan --write-layout``,
    ``demo``); anything else at the path is never replaced.
    """
    doc = small_toml(path)
    return doc is not None and doc.get("shape") in SHAPES and set(doc) <= set(TOP_KEYS)
