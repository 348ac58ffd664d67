"""Logs kept in many files and several sources, read as one log.

A *source* is a named part of an archive ("teleop", "scripted", "policy-v3") with its own
layout; its logs are a list of files, globs and folders, expanded and sorted in natural order of
their full paths (so the order of the list does not matter). Every file is opened with the
source's layout by the reader of its shape; :class:`MultiSource` puts them side by side.

Stable episode ids. Within a source, an episode's id is its position in the source's files
taken one after the other (as if they were one concatenated log), plus the source's *base*:
0 for the one unnamed source of ``[logs]``, and ``tag(name) << SOURCE_SHIFT`` for a named
source, where ``tag`` is a hash of the name alone. So the ids of a source (and with them the
split and every random draw, pure functions of the ids) do not depend on which other sources
are present, nor on the order the sources are listed in. Episodes are handed out in id order.
"""

from __future__ import annotations

import glob
import os
from dataclasses import dataclass, field, replace

import numpy as np

from goalkit.archive import SOURCE_SHIFT, InlineLayout, SourceSpec, is_pattern, source_base
from goalkit.config import parse_toml
from goalkit.errors import GoalkitError, LayoutError, LogError
from goalkit.logs.bagfile import is_bag_path
from goalkit.logs.bagscan import list_topics, propose_bag_layout
from goalkit.logs.detect import propose_layout
from goalkit.logs.episodes import EpisodeSet, concat_episodes, kept_task_ids
from goalkit.logs.layout import load_layout, parse_layout
from goalkit.logs.naming import natural_key
from goalkit.logs.opener import open_logs
from goalkit.logs.source import CHECK_CHUNK

#: File name endings taken from a folder (for shapes other than per-file).
LOG_SUFFIXES = (".h5", ".hdf5", ".hdf", ".npz")


def _natural_path(path: str) -> tuple:
    return natural_key(path), path


def expand_entries(entries, shape: str | None, *, file=None, key="logs.path") -> list[str]:
    """The log files (or per-file folders) that a list of files, globs and folders names.

    Parameters
    ----------
    entries : sequence of str
        Absolute paths: files, folders, glob patterns.
    shape : str or None
        The layout's shape: a folder is one log for ``"per-file"`` and ``"bag"``, else it stands
        for the ``.h5``/``.hdf5``/``.hdf``/``.npz`` files directly in it.
    file : str, optional
        The recipe, for messages.
    key : str
        The recipe key, for messages.

    Returns
    -------
    list of str
        In natural order of the full paths, each once.

    Raises
    ------
    LogError
        A missing file or folder, a glob that matches nothing, or a folder without logs. A file
        named twice (overlapping globs, a link) is kept once, under its first name in order.
    """
    folder_is_log = shape in ("per-file", "bag", "table")
    out = []
    for entry in entries:
        entry = str(entry)
        if is_pattern(entry):
            matches = glob.glob(entry)
            if not matches:
                raise LogError(f"the pattern {entry} matches no file; expected at least one log", file=file,
                               key=key)
        elif not os.path.lexists(entry):
            raise LogError(f"{entry}: file not found", file=file, key=key)
        else:
            matches = [entry]
        for m in matches:
            if os.path.isdir(m) and not folder_is_log:
                inside = [os.path.join(m, n) for n in os.listdir(m) if n.lower().endswith(LOG_SUFFIXES)]
                if not inside:
                    raise LogError(f"{m}: the folder holds no {', '.join(LOG_SUFFIXES)} files", file=file, key=key)
                out += inside
            else:
                out.append(m)
    out = sorted({os.path.abspath(p) for p in out}, key=_natural_path)
    seen, kept = set(), []
    for p in out:                         # one file named twice (a link, overlapping globs) is read once
        try:
            st = os.stat(p)
            ident = (st.st_dev, st.st_ino)
        except OSError:
            ident = p                     # the reader names a dangling link or a loop
        if ident not in seen:
            seen.add(ident)
            kept.append(p)
    out = kept
    return out


def source_layout(spec):
    """A source's layout: given, written in the recipe (parsed here), from its file, or None."""
    if isinstance(spec.layout, InlineLayout):
        try:
            return parse_layout(spec.layout.table, spec.layout.file)
        except LayoutError as exc:          # name the recipe key the table sits under
            key = spec.layout.key + (f".{exc.key}" if exc.key else "")
            raise LayoutError(exc.message, file=spec.layout.file, key=key) from None
    if spec.layout is not None or not spec.layout_path:
        return spec.layout
    return load_layout(spec.layout_path)


def _name_source(exc, name: str) -> None:
    """Add the source's name to an error about one of its files."""
    if name:
        exc.message += f" (source '{name}')"
        exc.args = (exc.render(),)


@dataclass
class _Part:
    """One opened file of one source."""

    code: int
    offset: int                   # id of the file's first episode (source base + earlier files)
    log: object
    kept: int = field(init=False)

    def __post_init__(self):
        self.kept = int(len(self.log.lengths))


def _signature(es: EpisodeSet) -> tuple:
    """What every file of every source must agree on."""
    def width(x):
        return None if x is None else tuple(x.shape[1:])
    return (("observation width", es.observations.shape[1]), ("action width", es.actions.shape[1]),
            ("fields", tuple(sorted(es.fields.items()))), ("task reward", es.rewards is not None),
            ("success flag", es.success is not None), ("task id", es.task_ids is not None),
            ("task goal width", width(es.task_goals)), ("frame shape", width(es.frames)),
            ("termination flag", es.terminations is not None), ("time-limit flag", es.time_limits is not None))


class MultiSource:
    """Several files of several sources read as one log (implements LogSource).

    Parameters
    ----------
    specs : sequence of SourceSpec
        The sources, in the recipe's order (their position is their code in the ``source``
        column).
    named : bool
        Whether the sources are named (``[[sources]]``): their rows then carry a source column.
    file : str, optional
        The recipe, for messages.

    Attributes
    ----------
    source_names : list of str
        Source code -> name.
    episode_sources : ndarray of int16
        Source code of every kept episode.
    files : list of str
        Every file read, in reading order.
    """

    def __init__(self, specs, named: bool = False, file=None):
        specs = list(specs)
        self.named = bool(named)
        self.source_names = [s.name for s in specs]
        self.file = file
        bases = {}
        for code, s in enumerate(specs):
            base = source_base(s.name)
            if base in bases:
                other = specs[bases[base]].name
                raise LogError(f"sources '{other}' and '{s.name}' get the same episode ids (equal names or a "
                               f"hash collision); expected distinct names", file=file, key=s.key)
            bases[base] = code
        self.parts: list[_Part] = []
        self.notes, self.skipped, self.files = [], [], []
        self.file_entries = []
        self.layouts = {}
        for base in sorted(bases):
            code = bases[base]
            s = specs[code]
            layout = source_layout(s)
            shape = layout.shape if layout is not None else None
            offset = base
            files = expand_entries(s.entries, shape, file=file, key=s.key)
            if layout is None and files:
                # no layout: the one proposed for the source's first file reads all its files (the
                # layout a set records for the source, with which verify reopens them)
                try:
                    layout = (propose_bag_layout(list_topics(files[0])) if is_bag_path(files[0])
                              else propose_layout(files[0]))
                except GoalkitError as exc:
                    _name_source(exc, s.name)
                    raise
            self.layouts[code] = layout
            self.file_entries.append((code, files))
            for path in files:
                try:
                    log = open_logs(path, layout, skip_bad_episodes=s.skip_bad_episodes)
                except GoalkitError as exc:      # say which source the file belongs to
                    _name_source(exc, s.name)
                    raise
                if offset + log.total_episodes >= base + (1 << SOURCE_SHIFT) and base:
                    raise LogError(f"more than 2**{SOURCE_SHIFT} episodes in one source", file=path)
                self.parts.append(_Part(code, offset, log))
                self.files += list(log.files)
                self.notes += [f"{path}: {n}" for n in log.notes]
                self.skipped += [(int(offset + e), f"{path}: {r}") for e, r in log.skipped]
                offset += log.total_episodes
        first = self.parts[0].log
        self.path = os.path.commonpath(self.files) if len(self.files) > 1 else first.path
        self.layout = first.layout
        self.convention = first.convention
        self.fields = dict(first.fields)
        self.total_episodes = int(sum(p.log.total_episodes for p in self.parts))
        self.episode_ids = np.concatenate([p.log.episode_ids + p.offset for p in self.parts]).astype(np.int64)
        self.lengths = np.concatenate([p.log.lengths for p in self.parts]).astype(np.int64)
        self.episode_sources = np.concatenate([np.full(p.kept, p.code, np.int16) for p in self.parts])
        self._starts = np.concatenate([[0], np.cumsum([p.kept for p in self.parts])]).astype(np.int64)
        self._check_agreement()

    def _check_agreement(self):
        """Every file gives the same columns and widths; one dtype for observations and actions."""
        ref, ref_path, obs_dt, act_dt = None, None, [], []
        for p in self.parts:
            es = p.log.read(0, 1)
            obs_dt.append(es.observations.dtype)
            act_dt.append(es.actions.dtype)
            sig = _signature(es)
            if ref is None:
                ref, ref_path = sig, p.log.path
                continue
            for (what, mine), (_, theirs) in zip(sig, ref):
                if mine != theirs:
                    name = self.source_names[p.code]
                    raise LogError(f"{what} is {mine}, but {theirs} in {ref_path}; expected every file of every "
                                   f"source to agree" + (f" (source '{name}')" if name else ""), file=p.log.path)
        self.obs_dtype = np.result_type(*obs_dt)
        self.action_dtype = np.result_type(*act_dt)

    @property
    def num_episodes(self) -> int:
        """Number of kept episodes."""
        return int(self.lengths.shape[0])

    def source_of(self, episode_ids) -> np.ndarray:
        """Source code of each (kept) episode id."""
        pos = np.searchsorted(self.episode_ids, np.asarray(episode_ids, dtype=np.int64))
        return self.episode_sources[pos]

    def known_task_ids(self) -> np.ndarray | None:
        """The task id of every kept episode, file by file (each as cheaply as its reader can)."""
        per = [kept_task_ids(p.log, CHECK_CHUNK) for p in self.parts]
        return None if per[0] is None else np.concatenate(per).astype(np.int64, copy=False)

    def read(self, start: int, stop: int) -> EpisodeSet:
        """Kept episodes at positions ``start .. stop - 1`` (ids: see the module docstring)."""
        start, stop = int(start), int(stop)
        if not 0 <= start <= stop <= self.num_episodes:
            raise IndexError(f"episode range {start}:{stop} outside 0:{self.num_episodes}")
        pieces = []
        for i, p in enumerate(self.parts):
            lo = int(self._starts[i])
            a, b = max(start - lo, 0), min(stop - lo, p.kept)
            if b > a:
                pieces.append(_relabel(p.log.read(a, b), p, self.obs_dtype, self.action_dtype))
        if not pieces:
            p = self.parts[0]
            pieces.append(_relabel(p.log.read(0, 0), p, self.obs_dtype, self.action_dtype))
        return concat_episodes(pieces)

    def key_info(self) -> list[dict]:
        """Role, key, dtype and shape of every mapped key, per file."""
        out = []
        for p in self.parts:
            out += [{**row, "file": p.log.path} for row in p.log.key_info()]
        return out

    def __repr__(self):
        return (f"MultiSource(files={len(self.files)}, sources={self.source_names!r}, "
                f"episodes={self.num_episodes}, transitions={int(self.lengths.sum())})")


def _relabel(es: EpisodeSet, part: _Part, obs_dtype, action_dtype) -> EpisodeSet:
    """``es`` with stable ids, its source code and the archive's dtypes."""
    return replace(es, episode_ids=es.episode_ids + part.offset,
                   observations=es.observations.astype(obs_dtype, copy=False),
                   actions=es.actions.astype(action_dtype, copy=False),
                   sources=np.full(es.num_episodes, part.code, np.int16))


def open_sources(specs, named: bool = False, file=None) -> MultiSource:
    """Open several sources of several files as one log (see :class:`MultiSource`)."""
    return MultiSource(specs, named=named, file=file)


def specs_from_provenance(records, error, file=None) -> tuple:
    """The sources of a set as they were read at build time (expanded paths, stored layout text).

    Parameters
    ----------
    records : list of dict
        The provenance's ``sources``.
    error : type
        The GoalkitError subclass to raise on a malformed record.
    """
    if not isinstance(records, list) or not records:
        raise error("expected a non-empty list of source records", file=file, key="provenance.sources")
    specs = []
    for i, r in enumerate(records):
        ok = (isinstance(r, dict) and isinstance(r.get("name"), str) and isinstance(r.get("paths"), list)
              and all(isinstance(p, str) for p in r["paths"]) and isinstance(r.get("layout_text", ""), str))
        if not ok:
            raise error("expected {name, paths, layout_text, ...}", file=file, key=f"provenance.sources[{i}]")
        text = r.get("layout_text", "")
        layout = parse_layout(parse_toml(text, f"{file}:sources[{i}].layout", error), f"{file}:layout") if text else None
        layout_path = r.get("layout_path", "")
        specs.append(SourceSpec(r["name"], tuple(r["paths"]), layout, bool(r.get("skip_bad_episodes", False)),
                                f"sources[{i}].path", layout_path if isinstance(layout_path, str) else "", text))
    return tuple(specs)
