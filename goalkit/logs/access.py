"""One small interface over "a place holding named arrays": an HDF5 group or a .npz file.

Readers ask for shapes and dtypes first (cheap: metadata only) and read rows by slice later.
Key names in messages are the full path of the dataset inside the file.

Every key is checked from metadata before a row is read (see :mod:`goalkit.logs.limits`): its
links (an external link is refused: it would read another file; a soft link must resolve inside
the file, a dangling one or a loop is refused by name), its declared shape and dtype against the
limits and the file's size, and, for logs with one group per episode, that no two episodes
share one dataset. Errors h5py raises while reading (a damaged chunk, a broken B-tree or object
header) become one LogError naming the file, the key, the episode and the rows.
"""

from __future__ import annotations

import contextlib
import math
import os
import posixpath
import zipfile
import zlib

import h5py
import numpy as np

from goalkit.errors import LogError
from goalkit.logs import limits
from goalkit.logs.columns import base_key, select, selected_shape
from goalkit.logs.npzfile import NpzArrays

#: What h5py, zipfile and zlib raise on damaged files (turned into one-line LogErrors).
READ_ERRORS = (OSError, RuntimeError, KeyError, ValueError, TypeError, EOFError,
               zipfile.BadZipFile, zlib.error)

#: Most values of an attribute that is read (a task id stored as an attribute is one value).
MAX_ATTR_VALUES = 2 ** 20

_MEMORY_TYPES: dict = {}


def memory_type(dtype: np.dtype):
    """The HDF5 memory type of a numeric numpy dtype, made once per dtype.

    h5py builds it anew on every read otherwise, which is a quarter of the cost of reading the
    many small datasets of logs with one group per episode.
    """
    found = _MEMORY_TYPES.get(dtype)
    if found is None:
        found = _MEMORY_TYPES[dtype] = h5py.h5t.py_create(dtype)
    return found


def short(exc: BaseException) -> str:
    """An exception's text on one line, shortened (h5py's messages can be long)."""
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 200 else text[:197] + "..."


_PACKAGE = os.path.dirname(os.path.dirname(os.path.abspath(__file__))) + os.sep


def raised_here(exc: BaseException) -> bool:
    """True when ``exc`` is a TypeError raised by goalkit's own code (its innermost frame is in
    the goalkit package, not in h5py, numpy or zipfile): a wrong call, a bug of ours, never a
    damaged file."""
    if not isinstance(exc, TypeError):
        return False
    tb, last = exc.__traceback__, None
    while tb is not None:
        last, tb = tb, tb.tb_next
    name = "" if last is None else last.tb_frame.f_code.co_filename
    return os.path.isabs(name) and name.startswith(_PACKAGE)     # h5py's Cython frames are relative


@contextlib.contextmanager
def guard(file, key=None, episode=None, what="cannot read the log", rows=None):
    """Turn what h5py, zipfile or zlib raise on a damaged file into one LogError.

    LogErrors pass through unchanged, and so does a TypeError raised by goalkit's own code
    (:func:`raised_here`): reported as a damaged file, a bug of ours would send the user to
    check a good log.

    Parameters
    ----------
    file, key, episode : optional
        Where, for the message.
    what : str
        What was being done (``"cannot read the episode group"``).
    rows : (int, int), optional
        The rows being read, for the message.
    """
    try:
        yield
    except LogError:
        raise
    except READ_ERRORS as exc:
        if raised_here(exc):
            raise
        where = f" (rows {rows[0]}:{rows[1]})" if rows is not None else ""
        raise LogError(f"{what}{where}, the file may be truncated or corrupt ({short(exc)})",
                       file=file, key=key, episode=episode) from exc


def describe_link(h5file, path: str) -> str | None:
    """Why the object at absolute ``path`` cannot be opened, if a link is the reason.

    Follows soft links by name without letting HDF5 recurse: returns a phrase for an external
    link, a dangling soft link or a soft-link loop, and None when links are not the problem.
    """
    chain = [path]
    cur = path
    for _ in range(64):
        try:
            link = h5file.get(cur, getlink=True)
        except READ_ERRORS:
            link = None
        if link is None:
            if cur == path:
                return None                          # plainly missing
            return f"is a soft link to {cur}, which does not exist (a dangling link)"
        if isinstance(link, h5py.ExternalLink):
            return (f"is an external link to {link.path} in file {link.filename}; links to other "
                    f"files are refused (they would read another file)") if cur == path else (
                f"is a soft link to {cur}, an external link to file {link.filename}; links to "
                f"other files are refused")
        if not isinstance(link, h5py.SoftLink):
            return None                              # a hard link: the object itself is the problem
        target = link.path if link.path.startswith("/") else posixpath.join(posixpath.dirname(cur), link.path)
        target = posixpath.normpath(target)
        if target in chain:
            return f"is a soft link loop ({' -> '.join(chain + [target])})"
        chain.append(target)
        cur = target
    return f"is a chain of more than 64 soft links ({' -> '.join(chain[:4])} -> ...)"


_PREFIXES: dict = {}


def _prefixes(key: str) -> list:
    """``[(prefix, prefix as bytes), ...]`` of each path component of ``key`` (cached)."""
    found = _PREFIXES.get(key)
    if found is None:
        parts = [p for p in key.split("/") if p]
        base = "/" if key.startswith("/") else ""
        found = [(base + "/".join(parts[: i + 1]),) for i in range(len(parts))]
        found = _PREFIXES[key] = [(p, p.encode("utf-8")) for (p,) in found]
    return found


def link_problem(group, key: str) -> str | None:
    """A phrase when some component of ``key`` inside ``group`` is an external link or a soft
    link that does not resolve; None when every component is a hard link or a good soft link,
    or the key is simply missing (one low-level look-up per component)."""
    links = group.id.links
    for prefix, raw in _prefixes(key):
        try:
            kind = links.get_info(raw).type
        except READ_ERRORS:
            break                                    # missing (or behind a broken link: see below)
        if kind == _HARD:
            continue
        full = prefix if prefix.startswith("/") else posixpath.join(group.name, prefix)
        if kind == h5py.h5l.TYPE_EXTERNAL:
            return describe_link(group.file, full)
        try:
            h5py.h5o.open(group.id, raw)
        except READ_ERRORS:
            return describe_link(group.file, full) or "is a soft link that does not resolve"
    return None


_HARD = h5py.h5l.TYPE_HARD


class DatasetOwners:
    """Which episode first reached each dataset of a log: a dataset reached from two episodes
    is refused.

    Holds one small entry per dataset (its address -> the episode), so that tens of thousands
    of episodes cost a few MiB; the key naming the first episode's dataset is looked up again
    only for the message, by ``locate(episode, identity)``.
    """

    def __init__(self, locate):
        self._locate = locate
        self._owner: dict = {}
        self._fileno = None

    def claim(self, ident, episode: int):
        """Record ``ident`` = (file number, address) for ``episode``; the other episode that
        reached it first, or None."""
        fileno, addr = ident
        if self._fileno is None:
            self._fileno = fileno
        key = addr if fileno == self._fileno else ident
        other = self._owner.setdefault(key, episode)
        return None if other == episode else other

    def owners(self) -> dict:
        """The live table: address (or identity, for another file) -> episode."""
        return self._owner

    def claims(self, start: int = 0) -> list:
        """``(address, episode)`` of the datasets first reached by episodes from ``start`` on."""
        return [(k, e) for k, e in self._owner.items() if e >= start and not isinstance(k, tuple)]

    def where(self, episode: int, ident) -> str:
        """The key by which ``episode`` reaches dataset ``ident`` (for messages)."""
        return self._locate(episode, ident)


class H5Access:
    """Arrays inside one HDF5 group (``group`` is an open ``h5py.Group``).

    Dataset metadata is looked up once per key through h5py's low-level API (opening a
    dataset through the high-level one costs several times more, which matters for logs with
    many thousands of episode groups).

    Parameters
    ----------
    group : h5py.Group
    file : str
        The file, for messages.
    file_size : int, optional
        The file's size in bytes (declared shapes are checked against it).
    max_rows : int
        Most rows of one array (:data:`~goalkit.logs.limits.MAX_EPISODE_STEPS` for an episode
        group, :data:`~goalkit.logs.limits.MAX_LOG_ROWS` for a flat log).
    episode : int, optional
        The episode the group holds (errors name it and are then per-episode problems).
    seen : DatasetOwners, optional
        Shared by the episodes of one log; a dataset reached from two episodes is refused.
    """

    def __init__(self, group, file, *, file_size=None, max_rows=limits.MAX_LOG_ROWS, episode=None,
                 seen=None):
        self.group = group
        self.file = str(file)
        self.prefix = group.name.strip("/")
        self.file_size = file_size
        self.max_rows = max_rows
        self.episode = episode
        self.seen = seen
        self._info = {}
        self._where = {}
        self._fno = None

    def where(self, key: str) -> str:
        """The key's full path inside the file, for messages."""
        found = self._where.get(key)
        if found is None:
            key0 = base_key(key)
            if key0.startswith("/"):
                found = key0.strip("/")
            else:
                found = f"{self.prefix}/{key0}" if self.prefix else key0
            self._where[key] = found
        return found

    def _error(self, message, key) -> LogError:
        return LogError(message, file=self.file, key=self.where(key), episode=self.episode)

    def names(self) -> list[str]:
        """Names of the datasets directly in the group (for messages)."""
        out = []
        try:
            for name in self.group.keys():
                try:
                    if isinstance(self.group.get(name), h5py.Dataset):
                        out.append(name)
                except READ_ERRORS:
                    continue
        except READ_ERRORS:
            pass
        return sorted(out)

    def _lookup(self, key: str):
        key = base_key(key)
        if key not in self._info:
            self._info[key] = self._open(key)
        return self._info[key]

    def _open(self, key: str):
        raw = key.encode("utf-8")
        hard_addr = None
        if "/" not in key:                   # one component: one look-up of the link
            links = self.group.id.links
            try:
                link = links.get_info(raw)
            except READ_ERRORS:
                link = None                  # missing, or damaged: the look-ups below name the problem
                try:
                    if not links.exists(raw):
                        return None          # missing (what _why_not_opened would find)
                except READ_ERRORS:
                    pass
            if link is not None and link.type == _HARD:
                hard_addr = link.u           # the object's address: its identity, without opening it
        if hard_addr is None:
            problem = link_problem(self.group, key)
            if problem is not None:
                raise self._error(problem, key)
        try:
            dsid = h5py.h5d.open(self.group.id, raw)
        except KeyError as exc:              # missing, not a dataset, or a damaged object header
            return self._why_not_opened(key, exc)
        except READ_ERRORS as exc:
            raise self._error(f"cannot open dataset, the file may be corrupt ({short(exc)})", key) from exc
        try:
            shape = tuple(int(n) for n in dsid.shape)
            dtype = dsid.dtype
        except READ_ERRORS as exc:
            raise self._error(f"cannot read the dataset's shape or type, the file may be corrupt "
                              f"({short(exc)})", key) from exc
        if shape:
            per_row = math.prod(shape[1:])
            declared = shape[0] * per_row * dtype.itemsize
            if not (0 < per_row <= limits.MAX_ROW_VALUES and shape[0] <= self.max_rows
                    and (self.file_size is None or declared <= self.file_size)):
                bound = None if self.file_size is None else limits.h5_byte_bound(dsid, declared, self.file_size)
                limits.check_declared(shape, dtype, max_rows=self.max_rows,
                                      max_bytes=None if bound is None else bound[0],
                                      bound="" if bound is None else bound[1],
                                      file=self.file, key=self.where(key), episode=self.episode)
        if self.seen is not None:
            try:
                if hard_addr is not None:
                    ident = (self._fileno(), hard_addr)
                else:
                    info = h5py.h5o.get_info(dsid)
                    ident = (info.fileno, info.addr)
            except READ_ERRORS as exc:
                raise self._error(f"cannot read the dataset's header ({short(exc)})", key) from exc
            other = self.seen.claim(ident, self.episode)
            if other is not None:
                raise self._error(f"is the same dataset as key {self.seen.where(other, ident)} of episode "
                                  f"{other} (a link or key shared by episodes); expected each episode "
                                  f"to hold its own data", key)
        return (dsid, shape, dtype)

    def _fileno(self) -> int:
        """The HDF5 file number of the group's file (the first half of an object's identity)."""
        if self._fno is None:
            self._fno = h5py.h5o.get_info(self.group.id).fileno
        return self._fno

    def _why_not_opened(self, key, exc):
        """None when ``key`` is missing or names a group; a LogError when its object is damaged."""
        try:
            exists = self.group.id.links.exists(key.encode("utf-8"))
        except READ_ERRORS:
            exists = False
        if not exists:
            return None
        try:
            obj = h5py.h5o.open(self.group.id, key.encode("utf-8"))
        except READ_ERRORS as exc2:
            raise self._error(f"cannot open dataset, the file may be corrupt ({short(exc2)})", key) from exc
        if isinstance(obj, h5py.h5d.DatasetID):
            raise self._error(f"cannot open dataset, the file may be corrupt ({short(exc)})", key) from exc
        return None

    def has(self, key: str) -> bool:
        """True when ``key`` is a dataset of the group."""
        return self._lookup(key) is not None

    def _require(self, key):
        info = self._lookup(key)
        if info is None:
            raise self._error("cannot open dataset: missing, not a dataset, or the file is corrupt", key)
        return info

    def shape(self, key: str) -> tuple:
        """Shape of dataset ``key`` (of its selected columns, for a column key)."""
        return selected_shape(key, self._require(key)[1], file=self.file, where=self.where(key),
                              episode=self.episode)

    def dtype(self, key: str) -> np.dtype:
        """Dtype of dataset ``key``."""
        return self._require(key)[2]

    def read(self, key: str, start=None, stop=None) -> np.ndarray:
        """Rows ``start:stop`` (default all) of dataset ``key`` (its selected columns, for a column key)."""
        if key is not base_key(key):
            self.shape(key)                  # checks the column indices
            return select(key, self.read(base_key(key), start, stop))
        dsid, shape, dtype = self._require(key)
        a = b = None
        try:
            if shape == ():
                return np.asarray(self.group[key][()])
            n = shape[0]
            a = 0 if start is None else max(0, min(int(start), n))
            b = n if stop is None else max(a, min(int(stop), n))
            if (a, b) == (0, n) and dtype.kind in "biuf":
                out = np.empty(shape, dtype=dtype)
                if out.size:
                    dsid.read(h5py.h5s.ALL, h5py.h5s.ALL, out, mtype=memory_type(dtype))
                return out
            return self.group[key][a:b]
        except READ_ERRORS as exc:
            rows = "" if a is None else f" (rows {a}:{b})"
            raise self._error(f"cannot read dataset{rows}, the file may be truncated or corrupt "
                              f"({short(exc)})", key) from exc

    def attr(self, key: str):
        """Attribute ``key`` of the group, or None.

        Its declared shape is checked first: an attribute holding more than
        :data:`MAX_ATTR_VALUES` values is refused rather than read.
        """
        raw = key.encode("utf-8")
        try:
            if not h5py.h5a.exists(self.group.id, raw):
                return None
            aid = h5py.h5a.open(self.group.id, raw)
            shape = aid.shape
            n = math.prod(shape)
        except READ_ERRORS:
            return None
        if n > MAX_ATTR_VALUES:
            raise self._error(f"attribute declares {n} values; expected at most {MAX_ATTR_VALUES} "
                              f"(a task id is one value)", key)
        try:
            dtype = aid.dtype
            if dtype.kind in "iuf" and not dtype.shape:  # numbers: read them directly (cheap)
                out = np.empty(shape, dtype=dtype)
                if out.size:
                    aid.read(out, mtype=memory_type(dtype))
                return out[()] if out.ndim == 0 else out
            return self.group.attrs[key]
        except READ_ERRORS:
            return None


class NpzAccess:
    """Arrays of one .npz file."""

    def __init__(self, arrays: NpzArrays, episode=None):
        self.arrays = arrays
        self.file = arrays.path
        self.episode = episode

    def where(self, key: str) -> str:
        """The key as named in messages (array names are used as they are)."""
        return base_key(key)

    def names(self) -> list[str]:
        """Names of the arrays (for messages)."""
        return sorted(self.arrays.keys())

    def has(self, key: str) -> bool:
        """True when the file holds array ``key``."""
        return base_key(key) in self.arrays

    def shape(self, key: str) -> tuple:
        """Shape of array ``key`` (of its selected columns, for a column key)."""
        return selected_shape(key, self.arrays.shape(base_key(key)), file=self.file, where=base_key(key),
                              episode=self.episode)

    def dtype(self, key: str) -> np.dtype:
        """Dtype of array ``key``."""
        return self.arrays.dtype(base_key(key))

    def read(self, key: str, start=None, stop=None) -> np.ndarray:
        """Rows ``start:stop`` (default all) of array ``key`` (its selected columns, for a column key)."""
        self.shape(key)                      # checks column indices
        with guard(self.file, base_key(key), self.episode, "cannot read array"):
            return select(key, self.arrays.read(base_key(key), start, stop))

    def attr(self, key: str):
        """Always None: .npz files have no attributes."""
        return None


def open_h5(path):
    """Open ``path`` read-only with h5py, turning every failure into a one-line LogError.

    The path must be a regular file (a FIFO or a device is never opened, a link loop is named).
    """
    path = str(path)
    limits.regular_file(path, what="an HDF5 file")
    try:
        if not h5py.is_hdf5(path):
            raise LogError("not an HDF5 file (no HDF5 signature); expected an .h5 file", file=path)
        h5 = h5py.File(path, "r")
    except LogError:
        raise
    except READ_ERRORS as exc:
        raise LogError(f"cannot open as HDF5, the file may be truncated or corrupt ({short(exc)})",
                       file=path) from None
    bound_metadata_cache(h5)
    return h5


#: Size of HDF5's metadata cache for a log opened for reading (fixed: it never grows). A log is
#: read episode after episode, each episode's headers once, so a small cache is enough, and it is
#: faster: on the demo's grouped logs (one CPU, one process each) 256 KiB against 4 MiB planned
#: 4,250 groups in 2.49-2.68 s against 2.61-2.87 s and 21,000 in 12.5-13.0 s against 14.4-15.0 s,
#: read them in 2.38-2.50 s against 2.75-2.87 s and 11.2-12.2 s against 13.6-14.8 s, and closed
#: in 5 ms against 110 ms (a close evicts every entry). 64 KiB was slower again at 21,000 groups
#: (14.8 s planning): the episode container's own index no longer fit.
METADATA_CACHE_BYTES = 256 << 10


def bound_metadata_cache(h5, nbytes: int = METADATA_CACHE_BYTES) -> None:
    """Fix the size of an open file's HDF5 metadata cache at ``nbytes``.

    By default HDF5 lets the cache grow while many objects are opened; scanning the object
    headers of tens of thousands of episode groups then costs hundreds of MiB and slows every
    look-up. A fixed small cache keeps memory flat whatever the number of episodes (the headers
    of one episode fit many times over).
    """
    try:
        cfg = h5.id.get_mdc_config()
        cfg.set_initial_size = True
        cfg.initial_size = cfg.min_size = cfg.max_size = int(nbytes)
        cfg.incr_mode = cfg.decr_mode = cfg.flash_incr_mode = 0     # H5C_*_off: never resized
        h5.id.set_mdc_config(cfg)
    except READ_ERRORS:   # an HDF5 that refuses the setting still reads correctly
        pass
