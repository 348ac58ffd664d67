"""Find the files a set was built from after they moved (relocatable sets, docs/dataset.md).

A set records, for each file it depends on (log files, the goal embedding, the goal library),
the absolute path at build time, the path relative to the set's folder (``relative``), its
size and its SHA-256; the provenance also records that folder (``set_folder``: the folder the
recipe's own ``[output] path`` names, so that ``--out`` does not change a set's bytes). Nothing
here ever changes a set: the recorded paths stay as they are, and a :class:`Relocation` maps
them to where the files are now.

Each file is looked for, in this order:

1. the recorded relative path, against the set's current folder (a set moved together with
   its logs needs nothing else, when it was written where its recipe says);
2. the recorded absolute path;
3. with a new root (``logs_root``, ``--logs-root``): under the root, at the file's place
   relative to the logs' common folder at build time (the root stands for that folder);
4. under the root, any regular file with the recorded size and SHA-256 (only files of the
   recorded size are hashed).

A file at the root's place (3) whose bytes differ is refused, naming both checksums; a file
found nowhere is refused with the places looked at and the option to pass. At the recorded
places (1, 2) only a regular file is ever read. Under the root nothing outside the root is
followed: the search does not enter linked folders, and a linked file counts only when it
resolves inside the root. The layout file (single-source sets) is found the same way and
matched by its text, which the set stores.
"""

from __future__ import annotations

import hashlib
import os
import stat
from dataclasses import dataclass, field
from pathlib import Path

from goalkit.errors import DatasetError
from goalkit.write.provenance import FILE_GROUPS, file_digest

#: The command-line option naming a new root for a set's files (``logs_root=`` in Python).
LOGS_ROOT_OPTION = "--logs-root"
#: Help text of the option (shared by every command that reads a set's logs).
LOGS_ROOT_HELP = ("Folder that now holds the logs the set was built from (standing for the logs' common "
                  "folder at build time), when they moved. Files are looked for beside the set first, "
                  "then at their recorded paths, then under this folder by their place and by size and "
                  "SHA-256 (candidates of the recorded size are hashed). The set is never modified.")


@dataclass(frozen=True)
class Wanted:
    """One file a set depends on, as recorded."""

    key: str            # where it is recorded, e.g. "provenance.log_files[0]"
    what: str           # "log file", "embedding file", "library file", "layout file"
    path: str           # the recorded absolute path
    relative: str | None
    size: int | None    # None: not recorded (the layout file, matched by text)
    sha256: str
    text: str | None = None

    def label(self) -> str:
        return f"{self.what} {self.path}"


def file_entries(prov: dict, file=None) -> list[tuple[str, dict]]:
    """The file entries of a provenance record, as ``(key, entry)``, type-checked.

    Raises
    ------
    DatasetError
        When an entry is not ``{"path": str, "bytes": int, "sha256": str[, "relative": str]}``.
    """
    library = prov.get("library") or {}
    out = []
    for key, _ in FILE_GROUPS:
        if key == "library.files":
            entries = library.get("files", []) if isinstance(library, dict) else None
        else:
            entries = prov.get(key, [])
        if not isinstance(entries, list):
            raise DatasetError("expected a list of file entries", file=file, key=f"provenance.{key}")
        for i, e in enumerate(entries):
            if not (isinstance(e, dict) and isinstance(e.get("path"), str) and isinstance(e.get("sha256"), str)
                    and isinstance(e.get("bytes"), int) and not isinstance(e.get("bytes"), bool)
                    and isinstance(e.get("relative", ""), str)):
                raise DatasetError('expected entries {"path": text, "bytes": number, "sha256": text, '
                                   '"relative": text}', file=file, key=f"provenance.{key}")
            out.append((f"provenance.{key}[{i}]", e))
    return out


def _inside(child: str, folder: str) -> bool:
    return child == folder or child.startswith(folder.rstrip(os.sep) + os.sep)


#: Digests of files read by the set reader, by (real path, device, inode, size, mtime, ctime).
_DIGEST_CACHE: dict[tuple, str] = {}


def _digest(path: str, st, cache: bool) -> str:
    if not cache:
        return file_digest(path)
    key = (os.path.realpath(path), st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns, st.st_ctime_ns)
    if key not in _DIGEST_CACHE:
        _DIGEST_CACHE[key] = file_digest(path)
    return _DIGEST_CACHE[key]


@dataclass
class Relocation:
    """Where a set's files are now.

    Attributes
    ----------
    found : dict of str to str
        Recorded absolute path -> the path the file was found at (the same when unmoved).
    digests : dict of str to str
        SHA-256 of each found file, by the found path (resolved).
    problems : list of (Wanted, str, str)
        Files found only at a recorded place where they no longer match (changed, or not a
        regular file), with that place and why: verify reports these as failures.
    folders : dict of str to str
        Folders placed by :meth:`path` (found -> recorded).
    """

    found: dict = field(default_factory=dict)
    digests: dict = field(default_factory=dict)
    problems: list = field(default_factory=list)
    folders: dict = field(default_factory=dict)

    def path(self, recorded, file=None):
        """Where the recorded file or folder ``recorded`` is now (None stays None).

        A folder moves with the files recorded inside it; when they were found in different
        folders, the folder cannot be placed and is refused.
        """
        if recorded is None:
            return None
        text = str(recorded)
        forms = list(dict.fromkeys((text, os.path.abspath(text), os.path.realpath(text))))
        for form in forms:
            if form in self.found:
                return Path(self.found[form])
        for folder in dict.fromkeys(os.path.abspath(f) for f in forms):
            places = set()
            for rec, actual in self.found.items():
                if rec != folder and _inside(rec, folder):
                    tail = Path(os.path.relpath(rec, folder)).parts
                    parts = Path(actual).parts
                    ok = len(parts) > len(tail) and parts[-len(tail):] == tail
                    places.add(str(Path(*parts[:-len(tail)])) if ok else None)
            if not places:
                continue
            if len(places) > 1 or None in places:
                raise DatasetError(f"the files of the folder {text} were found in different folders; put them "
                                   f"back in one folder as they were", file=file)
            place = places.pop()
            if place != folder:
                self.folders[place] = text
            return Path(place)
        return Path(text)

    def pairs(self) -> list[tuple[str, str]]:
        """(found, recorded) path pairs of files and folders, longest found path first."""
        out = {}
        for rec, actual in self.found.items():
            for form in {actual, os.path.abspath(actual), os.path.realpath(actual)}:
                if form != rec:
                    out[form] = rec
            a, r = Path(actual), Path(rec)
            if a.name == r.name and a.parent != r.parent:   # the file's folder moved with it
                out.setdefault(str(a.parent), str(r.parent))
        for actual, rec in self.folders.items():
            out.setdefault(actual, rec)
        return sorted(out.items(), key=lambda kv: -len(kv[0]))

    def restore(self, record):
        """``record`` (nested dicts, lists, text) with found paths put back as recorded.

        Used by verify to compare what it re-derives from the files where they are now with
        what the set recorded where they were.
        """
        pairs = self.pairs()
        if not pairs:
            return record

        def text(s: str) -> str:
            for actual, rec in pairs:
                if s == actual:
                    return rec
                for sep in (os.sep, ":"):
                    if s.startswith(actual + sep):
                        return rec + s[len(actual):]
            return s

        def walk(v):
            if isinstance(v, dict):
                return {k: walk(x) for k, x in v.items()}
            if isinstance(v, list):
                return [walk(x) for x in v]
            if isinstance(v, str):
                return text(v)
            return v

        return walk(record)


class _Root:
    """A new root: candidate places and a size index of its regular files (built on first use)."""

    def __init__(self, root):
        self.path = os.path.abspath(os.path.expanduser(str(root)))
        if not os.path.isdir(self.path):
            raise DatasetError("expected a folder holding the moved logs", key=LOGS_ROOT_OPTION, file=self.path)
        self.real = os.path.realpath(self.path)
        self._by_size = None

    def contains(self, path: str) -> bool:
        return _inside(os.path.realpath(path), self.real)

    def by_size(self, size: int) -> list[str]:
        if self._by_size is None:
            index: dict[int, list[str]] = {}
            for top, dirs, names in os.walk(self.path):   # linked folders are not entered
                dirs.sort()
                for name in sorted(names):
                    p = os.path.join(top, name)
                    try:
                        st = os.stat(p)
                    except OSError:
                        continue
                    if stat.S_ISREG(st.st_mode) and (not os.path.islink(p) or self.contains(p)):
                        index.setdefault(st.st_size, []).append(p)
            self._by_size = index
        return self._by_size.get(size, [])


def _check(want: Wanted, path: str, cache: bool):
    """``("ok", digest)``, ``("missing", None)``, ``("irregular", message)`` or ``("differs", digest)``."""
    try:
        st = os.stat(path)
    except (OSError, ValueError):
        return "missing", None
    if not stat.S_ISREG(st.st_mode):
        return "irregular", "not a regular file (a device, FIFO or folder); it is not read"
    if want.text is not None:
        try:
            text = Path(path).read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError):
            return "differs", ""
        digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
        return ("ok" if text == want.text else "differs"), digest
    if st.st_size != want.size:
        return "differs", None
    digest = _digest(path, st, cache)
    return ("ok" if digest == want.sha256 else "differs"), digest


def _changed(want: Wanted, path: str, digest, cache: bool) -> str:
    """Why the file at ``path`` is not ``want`` (for verify's failure list)."""
    if want.text is not None:
        return "changed since the build (its text differs from the layout stored in the set)"
    size = os.stat(path).st_size
    if size != want.size:
        return f"changed since the build (size {size} bytes, recorded {want.size})"
    return f"changed since the build (checksum {_prefix(digest)}, recorded {_prefix(want.sha256)})"


def _prefix(digest) -> str:
    return f"{digest[:12]}..." if digest else "unreadable"


def wanted_files(prov: dict, file=None) -> list[Wanted]:
    """Every file a set depends on: its file entries, and its layout file when it has one."""
    if not isinstance(prov, dict):
        raise DatasetError("expected a JSON object", file=file, key="provenance")
    out = []
    for key, e in file_entries(prov, file):
        what = dict(FILE_GROUPS)[key.split("[")[0].removeprefix("provenance.")]
        out.append(Wanted(key, what, e["path"], e.get("relative"), e["bytes"], e["sha256"]))
    layout, text = prov.get("layout_path"), prov.get("layout_text")
    if isinstance(layout, str) and layout and isinstance(text, str) and "sources" not in prov:
        folder = prov.get("set_folder")
        rel = None
        if isinstance(folder, str) and folder:
            try:
                rel = os.path.relpath(os.path.abspath(layout), folder)
            except ValueError:
                rel = None
        out.append(Wanted("provenance.layout_path", "layout file", os.path.abspath(layout), rel, None,
                          hashlib.sha256(text.encode("utf-8")).hexdigest(), text=text))
    return out


def _logs_base(wanted: list[Wanted]) -> str | None:
    """The logs' common folder at build time (the folder a new root stands for)."""
    folders = [os.path.dirname(w.path) for w in wanted if w.what == "log file"]
    if not folders:
        return None
    try:
        return os.path.commonpath(folders)
    except ValueError:
        return None


def locate(set_path, prov: dict, logs_root=None, *, strict: bool = True, cache: bool = False) -> Relocation:
    """Find every file a set depends on (see the module docstring for the order).

    Parameters
    ----------
    set_path : str or Path
        The set's file (its current folder is where recorded relative paths start).
    prov : dict
        The set's provenance.
    logs_root : str or Path, optional
        A new root for files no longer at their recorded places.
    strict : bool
        True (reader): a file that matches nowhere is refused, also when a changed one sits at its
        recorded place. False (verify): such a file is listed in ``problems`` instead.
    cache : bool
        Reuse the checksum of a file this process already hashed (same device, inode, size and
        times); verify never does.

    Returns
    -------
    Relocation

    Raises
    ------
    DatasetError
        One line: a file found nowhere (naming the places looked at and the option to pass), or a
        file under the new root whose checksum differs (naming both checksums).
    """
    set_path = Path(set_path)
    here = os.path.dirname(os.path.realpath(set_path))
    root = _Root(logs_root) if logs_root is not None else None
    wanted = wanted_files(prov, set_path)
    base = _logs_base(wanted)
    result = Relocation()
    for want in wanted:
        looked, changed = [], None
        places = []
        if want.relative is not None:
            places.append(os.path.normpath(os.path.join(here, want.relative)))
        places.append(want.path)
        hit = None
        for place in dict.fromkeys(places):
            looked.append(place)
            status, info = _check(want, place, cache)
            if status == "ok":
                hit = (place, info)
                break
            if status == "irregular" and changed is None:
                changed = (place, info)
            elif status == "differs" and changed is None:
                changed = (place, _changed(want, place, info, cache))
        if hit is None and root is not None:
            hit = _under_root(want, root, base, looked, set_path, cache)
        if hit is not None:
            result.found[want.path] = hit[0]
            if hit[1]:
                result.digests[os.path.realpath(hit[0])] = hit[1]
            continue
        if changed is not None and not (strict and want.text is None):
            result.problems.append((want, changed[0], changed[1]))
            continue
        if changed is not None:
            raise DatasetError(f"the {want.label()} at {changed[0]} is not the file this set was built from: "
                               f"{changed[1]}; put the recorded file back, or pass {LOGS_ROOT_OPTION} FOLDER "
                               f"(logs_root= in Python) naming where it is now", file=set_path, key=want.key)
        if want.text is not None:    # a missing layout file: reported by whatever reads it
            continue
        where = ", ".join(looked)
        raise DatasetError(f"cannot find the {want.label()} (looked at {where}); if the logs moved, pass "
                           f"{LOGS_ROOT_OPTION} FOLDER (logs_root= in Python) naming the folder that holds "
                           f"them now", file=set_path, key=want.key)
    return result


def _under_root(want: Wanted, root: _Root, base, looked: list, set_path, cache: bool):
    """Steps 3 and 4 under the new root: (path, digest) or None; a changed file at its place is refused."""
    rel = None
    if base is not None:
        r = os.path.relpath(want.path, base)
        if not r.startswith(os.pardir):
            rel = r
    place = os.path.normpath(os.path.join(root.path, rel if rel is not None else os.path.basename(want.path)))
    looked.append(place)
    if root.contains(place):
        status, digest = _check(want, place, cache)
        if status == "ok":
            return place, digest
        if status == "differs":
            if digest is None:   # another size: hash it for the message
                digest = file_digest(place)
            raise DatasetError(f"refusing {place}: it is not the {want.label()} this set was built from "
                               f"(checksum {_prefix(digest)}, recorded {_prefix(want.sha256)})",
                               file=set_path, key=want.key)
    size = want.size if want.size is not None else len(want.text.encode("utf-8"))
    looked.append(f"every file of {size} bytes under {root.path}")
    for candidate in root.by_size(size):
        status, digest = _check(want, candidate, cache)
        if status == "ok":
            return candidate, digest
    return None
