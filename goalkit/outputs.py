"""Safe outputs: the one way goalkit writes a file.

Every command and library function that writes goes through this module, so the same rules
hold everywhere (see the README's "Safety of your files"):

* **Never over an input.** :func:`check_no_overlap` resolves every output and every input
  (``os.path.realpath`` and a same-file check on device and inode, so symbolic and hard links
  are caught; a folder input counts with every file inside it) and refuses any overlap.
* **Exclusive temporary names.** Data is written to a temporary sibling of the output, named
  ``.NAME~goalkit-PID-HOST-TOKEN.tmp`` (:func:`temporary_name`): PID is the writing process,
  HOST eight hex digits of a hash of the machine's name, TOKEN twelve random hex digits. It is
  created with ``O_CREAT | O_EXCL | O_NOFOLLOW`` (HDF5 files: h5py's exclusive mode ``"x"``,
  which HDF5 opens with ``O_CREAT | O_EXCL``), so a file or link already at that name is never
  opened, followed or truncated; another random name is tried instead.
* **No half-written outputs.** The temporary file becomes the output only when complete: with
  a hard link that fails if anything (even a dangling link) is at the output path, or, when an
  existing output may be replaced, a rename.
* **Existing outputs need the caller's say-so.** An existing output path is refused unless
  ``replace`` is given (``--replace`` on the command line), and even then only a regular file of
  goalkit's own format for that output is replaced (the ``ours`` test of each output), never a
  link, a folder or anything else.
* **Leftovers of killed runs are removed.** Before a temporary file is made,
  :func:`remove_stale_temporaries` deletes the temporary files of the same output left by
  processes of this machine that are gone (their PID is not running, or the process now holding
  that PID started after the file was last written). Nothing whose name does not match the
  scheme exactly is ever deleted, and temporary files of other machines are left alone.
"""

from __future__ import annotations

import errno
import hashlib
import os
import re
import secrets
import socket
import stat
from contextlib import contextmanager
from pathlib import Path
from typing import Callable, Iterable

from goalkit.errors import OutputError

#: The option that allows replacing an existing output (named in messages).
REPLACE_OPTION = "--replace"
#: Characters of the output's name kept in a temporary name (file names are at most 255 bytes).
STEM_CHARS = 150
#: Tries at an unused random temporary name before giving up.
TRIES = 100

_TEMP = re.compile(r"^\.(?P<stem>.+)~goalkit-(?P<pid>[1-9][0-9]{0,9})-(?P<host>[0-9a-f]{8})"
                   r"-(?P<token>[0-9a-f]{12})\.tmp$", re.DOTALL)


# ---- names ----------------------------------------------------------------------------------
def host_tag() -> str:
    """Eight hex digits naming this machine in temporary names (a hash of its host name)."""
    return hashlib.sha256(socket.gethostname().encode("utf-8", "surrogateescape")).hexdigest()[:8]


def _token() -> str:
    return secrets.token_hex(6)


def _stem(name: str) -> str:
    return name[:STEM_CHARS]


def temporary_name(path, token: str | None = None) -> Path:
    """A temporary sibling of ``path`` in goalkit's one naming scheme.

    Parameters
    ----------
    path : str or Path
        The output.
    token : str, optional
        Twelve hex digits; random when omitted.

    Examples
    --------
    >>> temporary_name("/data/set.h5", token="0123456789ab").name.startswith(".set.h5~goalkit-")
    True
    """
    path = Path(path)
    return path.with_name(f".{_stem(path.name)}~goalkit-{os.getpid()}-{host_tag()}-{token or _token()}.tmp")


def parse_temporary(name: str) -> dict | None:
    """``{"stem", "pid", "host", "token"}`` of a name in the temporary scheme; None otherwise."""
    m = _TEMP.match(name)
    if m is None:
        return None
    return {"stem": m["stem"], "pid": int(m["pid"]), "host": m["host"], "token": m["token"]}


def is_temporary_of(name: str, output_name: str) -> bool:
    """True when ``name`` is a temporary name (exactly the scheme) of an output named ``output_name``."""
    parts = parse_temporary(name)
    return parts is not None and parts["stem"] == _stem(output_name)


# ---- stale temporaries ----------------------------------------------------------------------
def _process_start(pid: int) -> float | None:
    """Start time (seconds since the epoch) of process ``pid``, when the system tells (Linux)."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as f:
            fields = f.read().rsplit(b")", 1)[1].split()
        ticks = int(fields[19])  # field 22 of proc(5), counted after the command name
        with open("/proc/stat", "rb") as f:
            boot = next(int(line.split()[1]) for line in f if line.startswith(b"btime "))
        return boot + ticks / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError, StopIteration):
        return None


def _running(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OverflowError:
        return False
    return True


def is_stale(folder, name: str) -> bool:
    """True when ``folder/name`` is a goalkit temporary file of this machine whose writer is gone.

    Gone: no process has its PID, or the process with that PID started after the file was last
    modified (the PID was reused). The current process's own files are never stale.
    """
    parts = parse_temporary(name)
    if parts is None or parts["host"] != host_tag() or parts["pid"] == os.getpid():
        return False
    if not _running(parts["pid"]):
        return True
    started = _process_start(parts["pid"])
    if started is None:
        return False
    try:
        modified = os.lstat(os.path.join(folder, name)).st_mtime
    except OSError:
        return False
    return started > modified + 2.0  # a margin for the clock ticks of the start time


def remove_stale_temporaries(path) -> list[Path]:
    """Delete the stale temporary files of output ``path`` (see :func:`is_stale`).

    Only names that match the scheme exactly for this output's name are considered; a link
    with such a name is removed as a link (its target is untouched).

    Returns
    -------
    list of Path
        The files removed.
    """
    path = Path(path)
    folder = path.parent
    prefix = f".{_stem(path.name)}~goalkit-"
    removed = []
    try:
        names = [n for n in os.listdir(folder) if n.startswith(prefix)]
    except OSError:
        return removed
    for name in names:
        if is_temporary_of(name, path.name) and is_stale(folder, name):
            p = folder / name
            try:
                if not stat.S_ISDIR(os.lstat(p).st_mode):
                    os.unlink(p)
                    removed.append(p)
            except OSError:
                pass
    return removed


# ---- creating -------------------------------------------------------------------------------
_FLAGS = os.O_CREAT | os.O_EXCL | os.O_RDWR | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)


def create_temporary(path, *, sweep: bool = True) -> tuple[Path, int]:
    """Create a new, empty temporary sibling of ``path`` exclusively; return it and an open fd.

    The name is random (:func:`temporary_name`) and opened with ``O_CREAT | O_EXCL |
    O_NOFOLLOW``: whatever already exists at a name (a file, a planted link) is left alone and
    another name is tried. With ``sweep``, stale temporary files of ``path`` are removed first.

    Raises
    ------
    OutputError
        When the folder does not exist or cannot be written.
    """
    path = Path(path)
    if sweep:
        remove_stale_temporaries(path)
    last = None
    for _ in range(TRIES):
        tmp = temporary_name(path)
        try:
            return tmp, os.open(tmp, _FLAGS, 0o666)
        except FileExistsError as exc:
            last = exc
            continue
        except OSError as exc:
            if exc.errno == errno.ELOOP:  # a link at the name (systems that report it so)
                last = exc
                continue
            raise OutputError(f"cannot create a temporary file beside the output ({exc.strerror or exc})",
                              file=path) from None
    raise OutputError(f"cannot find an unused temporary name beside the output ({last})", file=path)


def identity(fd_or_stat) -> tuple[int, int]:
    """(device, inode) of an open fd or a stat result."""
    st = os.fstat(fd_or_stat) if isinstance(fd_or_stat, int) else fd_or_stat
    return st.st_dev, st.st_ino


def _close_quietly(f) -> None:
    """Close an h5py file whose writing was abandoned (errors closing it are of no use then)."""
    try:
        f.close()
    except Exception:                        # noqa: BLE001  it is removed right after
        pass


def discard(tmp) -> None:
    """Remove a temporary file of ours, if it is still there (never raises)."""
    try:
        os.unlink(tmp)
    except OSError:
        pass


def open_hdf5(path, **kwargs):
    """Create a new temporary sibling of ``path`` with h5py, exclusively, and open it for writing.

    h5py's mode ``"x"`` makes HDF5 open the file with ``O_CREAT | O_EXCL``, which fails on any
    existing name, a link (even a dangling one) included, so nothing is followed or truncated;
    another random name is tried instead. The file h5py opened is then checked to be the regular
    file at the temporary name (same device and inode).

    Returns
    -------
    (Path, h5py.File)
        The temporary path and the open file (``kwargs`` passed on to ``h5py.File``).
    """
    import h5py

    path = Path(path)
    remove_stale_temporaries(path)
    for _ in range(TRIES):
        tmp = temporary_name(path)
        try:
            f = h5py.File(tmp, "x", **kwargs)
        except FileExistsError:
            continue
        except OSError as exc:
            discard(tmp)   # HDF5 may have created it before failing; the random name is ours
            raise OutputError(f"cannot create the output file ({exc})", file=path) from None
        except BaseException:
            # interrupted (Ctrl-C) while h5py set the new file up: the file is on disk, the
            # caller never gets its name
            discard(tmp)
            raise
        try:
            handle = f.id.get_vfd_handle()
            st = os.lstat(tmp)
            same = stat.S_ISREG(st.st_mode) and (not isinstance(handle, int) or identity(handle) == identity(st))
        except (OSError, ValueError, TypeError):
            same = False
        except BaseException:
            _close_quietly(f)
            discard(tmp)
            raise
        if not same:  # pragma: no cover - needs a race with another process
            f.close()
            raise OutputError("the temporary file was replaced while it was opened; nothing written", file=path)
        return tmp, f
    raise OutputError("cannot find an unused temporary name beside the output", file=path)


# ---- existing outputs -----------------------------------------------------------------------
def refuse_existing(path, *, replace: bool = False, ours: Callable | None = None, what: str = "output",
                    option: str = REPLACE_OPTION) -> bool:
    """Refuse an existing output unless it may be replaced; return True when it exists.

    Parameters
    ----------
    path : str or Path
        The output.
    replace : bool
        The caller allows replacing an existing output of goalkit's own format.
    ours : callable, optional
        ``ours(path) -> bool``: the existing file is of the format this output has (a goalkit
        set, an embedding file, ...). None: no existing file is ever replaced.
    what : str
        What the output is, for messages ("dataset", "embedding file", ...).
    option : str
        The option that allows replacing, for messages.

    Raises
    ------
    OutputError
        One line: the output exists (and how to replace it), or is a link / folder / foreign file.
    """
    path = Path(path)
    try:
        st = os.lstat(path)
    except FileNotFoundError:
        return False
    except OSError as exc:
        raise OutputError(f"cannot check the output path ({exc.strerror or exc})", file=path) from None
    if stat.S_ISLNK(st.st_mode):
        raise OutputError(f"the {what} path is a symbolic link; goalkit never writes through or over a link "
                          f"(remove it or choose another path)", file=path)
    if stat.S_ISDIR(st.st_mode):
        raise OutputError(f"expected a file name for the {what}, got a folder", file=path)
    if not stat.S_ISREG(st.st_mode):
        raise OutputError(f"the {what} path exists and is not a regular file; not replaced", file=path)
    if not replace:
        raise OutputError(f"the {what} already exists; give {option} to replace it (or choose another path)",
                          file=path)
    if ours is None or not _safe_ours(ours, path):
        raise OutputError(f"the existing file is not a {what} written by goalkit; it is never replaced, "
                          f"even with {option} (move it or choose another path)", file=path)
    return True


def small_toml(path, max_bytes: int = 1 << 20) -> dict | None:
    """The TOML table in a small regular file, or None (too big, not UTF-8, not TOML, a link).

    For the "ours" tests of TOML outputs (layouts, recipes).
    """
    try:
        import tomllib
    except ImportError:  # Python 3.10
        import tomli as tomllib

    try:
        fd = open_no_follow(path, os.O_RDONLY, 0)
    except OSError:
        return None
    with os.fdopen(fd, "rb") as f:
        if not stat.S_ISREG(os.fstat(f.fileno()).st_mode):
            return None
        data = f.read(max_bytes + 1)
    if len(data) > max_bytes:
        return None
    try:
        return tomllib.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError):
        return None


def _safe_ours(ours, path) -> bool:
    try:
        return bool(ours(path))
    except Exception:  # an unreadable file is not ours  # noqa: BLE001
        return False


def publish(tmp, path, *, replace: bool = False, ours: Callable | None = None, what: str = "output",
            option: str = REPLACE_OPTION) -> Path:
    """Turn the complete temporary file ``tmp`` into the output ``path``.

    Without an existing output: a hard link, which fails if anything appeared at ``path``
    meanwhile, so nothing is ever replaced by accident (file systems without hard links get a
    rename after a fresh check). With one: :func:`refuse_existing` is asked again right before
    the rename. The temporary file is removed in every case.

    Raises
    ------
    OutputError
        As :func:`refuse_existing`, or when the file system refuses the rename.
    """
    path, tmp = Path(path), Path(tmp)
    try:
        if refuse_existing(path, replace=replace, ours=ours, what=what, option=option):
            os.replace(tmp, path)
            return path
        try:
            os.link(tmp, path, follow_symlinks=False)
        except FileExistsError:
            refuse_existing(path, replace=False, ours=ours, what=what, option=option)
            raise
        except OSError as exc:
            if exc.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV, errno.EMLINK,
                                 errno.ENOSYS):
                raise
            refuse_existing(path, replace=replace, ours=ours, what=what, option=option)
            os.replace(tmp, path)
            return path
        discard(tmp)
        return path
    except OutputError:
        discard(tmp)
        raise
    except OSError as exc:
        discard(tmp)
        raise OutputError(f"cannot write the {what} ({exc.strerror or exc})", file=path) from None


@contextmanager
def output_file(path, *, replace: bool = False, ours: Callable | None = None, what: str = "output",
                option: str = REPLACE_OPTION):
    """Open a new output for binary writing; it appears at ``path`` only if the block succeeds.

    Examples
    --------
    >>> with output_file("notes.bin") as f:          # doctest: +SKIP
    ...     f.write(b"...")
    """
    path = Path(path)
    refuse_existing(path, replace=replace, ours=ours, what=what, option=option)
    tmp, fd = create_temporary(path)
    try:
        with os.fdopen(fd, "wb") as f:
            yield f
    except BaseException as exc:
        discard(tmp)
        if isinstance(exc, OSError):
            raise OutputError(f"cannot write the {what} ({exc.strerror or exc})", file=path) from None
        raise
    publish(tmp, path, replace=replace, ours=ours, what=what, option=option)


def write_text(path, text: str, **kwargs) -> Path:
    """Write ``text`` (UTF-8) to the new output ``path`` (see :func:`output_file` for ``kwargs``)."""
    with output_file(path, **kwargs) as f:
        f.write(text.encode("utf-8"))
    return Path(path)


def _any_file(path) -> bool:
    return True


def write_own_file(path, write: Callable, *, what: str = "file", by_path: bool = False) -> Path:
    """Write a file inside a folder goalkit owns (a build folder), replacing a file of that name.

    ``write(f)`` gets a binary file object open on a new exclusive temporary file; with
    ``by_path``, ``write(tmp)`` gets that file's path instead (it exists, empty, under a random
    name). The result replaces a regular file at ``path`` (a stale shard); a link or a folder at
    ``path`` is refused, never followed.

    Raises
    ------
    OSError
        From ``write`` (disk full, file size limit); the temporary file is removed.
    OutputError
        When the temporary file cannot be created or something other than a file is at ``path``.
    """
    path = Path(path)
    tmp, fd = create_temporary(path, sweep=False)
    try:
        if by_path:
            os.close(fd)
            write(tmp)
        else:
            with os.fdopen(fd, "wb") as f:
                write(f)
    except BaseException:
        discard(tmp)
        raise
    return publish(tmp, path, replace=True, ours=_any_file, what=what)


# ---- folders --------------------------------------------------------------------------------
def own_folder(path, what: str = "folder") -> bool:
    """Create folder ``path`` exclusively, or adopt it if it is a real folder (not a link).

    Returns
    -------
    bool
        True when it was created now.

    Raises
    ------
    OutputError
        When a link, a file or anything else is at ``path``, or it cannot be created.
    """
    path = Path(path)
    try:
        os.mkdir(path, 0o777)
        return True
    except FileExistsError:
        pass
    except OSError as exc:
        raise OutputError(f"cannot create the {what} ({exc.strerror or exc})", file=path) from None
    st = os.lstat(path)
    if stat.S_ISLNK(st.st_mode):
        raise OutputError(f"the {what} is a symbolic link; goalkit never writes through a link at a name it "
                          f"owns (remove it)", file=path)
    if not stat.S_ISDIR(st.st_mode):
        raise OutputError(f"expected the {what} here, found a file (move it)", file=path)
    return False


def open_no_follow(path, flags: int = os.O_RDWR | os.O_CREAT, mode: int = 0o666) -> int:
    """``os.open`` that refuses a symbolic link at ``path`` (``O_NOFOLLOW``)."""
    return os.open(path, flags | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0), mode)


# ---- inputs versus outputs ------------------------------------------------------------------
def _stat(path):
    try:
        return os.stat(path)
    except (OSError, ValueError):
        return None


def _inside(child: str, folder: str) -> bool:
    return child != folder and child.startswith(folder.rstrip(os.sep) + os.sep)


class _Input:
    def __init__(self, label: str, path):
        self.label, self.path = label, str(path)
        self.real = os.path.realpath(self.path)
        st = _stat(self.path)
        self.is_dir = st is not None and stat.S_ISDIR(st.st_mode)
        self.files: dict[tuple[int, int], str] = {}
        if st is None:
            return
        if not self.is_dir:
            self.files[identity(st)] = self.path
            return
        for root, dirs, names in os.walk(self.path):
            for name in names:
                p = os.path.join(root, name)
                s = _stat(p)
                if s is not None and stat.S_ISREG(s.st_mode):
                    self.files.setdefault(identity(s), p)



#: The PNG file signature (ISO/IEC 15948, section 5.2).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def starts_with(path, prefix: bytes) -> bool:
    """True when ``path`` is a regular file (no link followed) whose first bytes are ``prefix``."""
    try:
        with os.fdopen(open_no_follow(path, os.O_RDONLY, 0), "rb") as f:
            return f.read(len(prefix)) == prefix
    except OSError:
        return False


def is_png(path) -> bool:
    """True when ``path`` is a regular file starting with the PNG signature (the "ours" test of plots)."""
    return starts_with(path, PNG_SIGNATURE)


def save_png(fig, path, replace: bool = False, what: str = "plot") -> Path:
    """Write the matplotlib figure ``fig`` to the new file ``path`` (temporary name, then published).

    An existing file is replaced only with ``replace`` and only if it is a PNG; the PNG carries
    no software or time metadata, so the same figure gives the same bytes.
    """
    with output_file(path, replace=replace, ours=is_png, what=what) as f:
        fig.savefig(f, format="png", metadata={"Software": None})
    return Path(path)

def check_no_overlap(inputs: Iterable, outputs: Iterable) -> None:
    """Refuse (one line, naming both paths) any output that is, or would touch, an input.

    Parameters
    ----------
    inputs : iterable of (label, path)
        Every file or folder the command reads ("logs", "layout", "recipe", ...). A folder
        counts with every file inside it. Missing paths and None are skipped.
    outputs : iterable of (label, path)
        Every path the command writes or creates (files and folders), labelled with the option
        that names it ("--out", "[output] path", ...).

    Raises
    ------
    OutputError
        When an output resolves (``os.path.realpath``) to an input, is the same file as an input
        file (device and inode: a symbolic or a hard link), lies inside an input folder, or holds
        an input inside it; or when two outputs are the same path.
    """
    ins = [_Input(label, p) for label, p in inputs if p is not None]
    outs = [(label, str(p)) for label, p in outputs if p is not None]
    seen: dict[str, str] = {}
    for label, out in outs:
        real = os.path.realpath(out)
        if real in seen:
            raise OutputError(f"{label} {out} is the same path as {seen[real]}; give each output its own path")
        seen[real] = f"{label} {out}"
        st = _stat(out)
        for inp in ins:
            clash = None
            if real == inp.real:
                clash = "is"
            elif st is not None and not stat.S_ISDIR(st.st_mode) and identity(st) in inp.files:
                clash = "is the same file as"
                if inp.is_dir:
                    clash = f"is the same file as {inp.files[identity(st)]} in"
            elif inp.is_dir and _inside(real, inp.real):
                clash = "lies inside"
            elif _inside(inp.real, real):
                clash = "holds"
            if clash is not None:
                raise OutputError(f"refusing to write over an input: {label} {out} {clash} the {inp.label} "
                                  f"{inp.path}; choose another output path")


__all__ = ["REPLACE_OPTION", "check_no_overlap", "create_temporary", "discard", "host_tag", "is_stale",
           "is_temporary_of", "open_hdf5", "open_no_follow", "output_file", "own_folder", "parse_temporary",
           "publish", "refuse_existing", "remove_stale_temporaries", "temporary_name", "write_text"]
