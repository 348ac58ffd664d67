"""Sane limits on what a log may declare, checked from metadata before anything is allocated.

A log declares every array's shape and dtype in its metadata (an HDF5 dataspace, a ``.npy``
header). A damaged or hostile file can declare a shape far beyond what it holds (an HDF5
dataset with chunked storage and no written chunks, an ``.npy`` header saying ``(10**12, 3)``),
and a reader that trusted it would allocate or iterate for ever. Readers therefore compare the
declared shape against these limits and against the bytes the file can hold, and refuse with
one line naming the file and the key before reading a row.

The limits (choices, not standards; each is far above any log this tool is meant for):

* :data:`MAX_EPISODE_STEPS` ``= 2**31`` rows per episode array: at 1 kHz that is 24 days of
  continuous logging in one episode; it also keeps every per-episode index inside int32.
* :data:`MAX_LOG_ROWS` ``= 2**40`` rows in one array of a flat log (about 10**12 transitions).
* :data:`MAX_WIDTH` ``= 1_000_000`` values per row of an observation, action or goal.
* :data:`MAX_ROW_VALUES` ``= 2**26`` values per row of any array (a 4096 x 4096 x 4 frame).
* :data:`DEFLATE_MAX_RATIO` ``= 1032``: the most that deflate can shrink data (zlib's own
  figure for its format, 1032:1, from memory of the zlib technical notes). Data declared
  larger than the file's size times this ratio cannot be in the file.

Byte rule. An array stored without a filter (HDF5 contiguous or unfiltered chunks, an
uncompressed ``.npy``) needs every declared byte in the file: declared bytes above the file's
size are refused. A filtered (compressed) array is refused when its declared bytes exceed the
file's size times :data:`DEFLATE_MAX_RATIO`. For a ``.npz`` member the zip directory's
uncompressed size must hold the declared data, and a deflated member may not claim to expand
more than :data:`DEFLATE_MAX_RATIO` times its compressed size.
"""

from __future__ import annotations

import errno
import os
import stat

import numpy as np

from goalkit.errors import LogError

#: Most rows of one array of an episode (grouped and per-file logs).
MAX_EPISODE_STEPS = 2 ** 31
#: Most rows of one array of a flat log.
MAX_LOG_ROWS = 2 ** 40
#: Most values per row of an observation, action or goal array.
MAX_WIDTH = 1_000_000
#: Most values per row of any array (frames included).
MAX_ROW_VALUES = 2 ** 26
#: Largest expansion deflate can achieve (zlib's figure for its format; from memory).
DEFLATE_MAX_RATIO = 1032

_KINDS = {stat.S_IFIFO: "a FIFO (named pipe)", stat.S_IFCHR: "a character device",
          stat.S_IFBLK: "a block device", stat.S_IFSOCK: "a socket", stat.S_IFDIR: "a directory"}


def regular_file(path, *, what="file", error=LogError) -> int:
    """Return the size of ``path`` after checking it is a regular file, without opening it.

    A FIFO or a device is never opened (reading one could block for ever), a symbolic link loop
    or a dangling link is named as such.

    Parameters
    ----------
    path : str or Path
        The file.
    what : str
        What the file should be, for the message (``"an HDF5 file"``).
    error : type
        The GoalkitError subclass to raise.

    Raises
    ------
    LogError (or ``error``)
        Missing, a dangling link, a link loop, a directory, a FIFO, a device or a socket.
    """
    path = str(path)
    try:
        st = os.stat(path)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise error(f"expected {what}, got a symbolic link loop", file=path) from None
        if exc.errno == errno.ENOENT and os.path.islink(path):
            raise error(f"expected {what}, got a dangling symbolic link (to {os.readlink(path)})",
                        file=path) from None
        if exc.errno == errno.ENOENT:
            raise error("file not found", file=path) from None
        raise error(f"expected {what}, cannot look at it ({exc.strerror})", file=path) from None
    if not stat.S_ISREG(st.st_mode):
        kind = _KINDS.get(stat.S_IFMT(st.st_mode), "something that is not a regular file")
        raise error(f"expected {what}, got {kind}", file=path)
    return int(st.st_size)


def check_declared(shape, dtype, *, max_rows: int, max_bytes: int | None, file, key, episode=None,
                   bound: str = "") -> None:
    """Refuse a declared shape that is absurd or cannot be held by the file.

    Parameters
    ----------
    shape : tuple of int
        The declared shape (``()`` for a scalar).
    dtype : numpy.dtype
        The declared dtype.
    max_rows : int
        :data:`MAX_EPISODE_STEPS` or :data:`MAX_LOG_ROWS`.
    max_bytes : int or None
        The most data bytes the file can hold for this array (None: not checked).
    bound : str
        How ``max_bytes`` was found, for the message.

    Raises
    ------
    LogError
        A negative or zero-width trailing dimension, too many rows, too many values per row,
        or more declared bytes than ``max_bytes``.
    """
    shape = tuple(int(n) for n in shape)
    if not shape:
        return
    rows, rest = shape[0], shape[1:]
    if rows < 0 or any(n < 0 for n in rest):
        raise LogError(f"declares an impossible shape {shape}", file=file, key=key, episode=episode)
    if any(n == 0 for n in rest):
        raise LogError(f"declares shape {shape}: rows of zero width; expected at least 1 value per row",
                       file=file, key=key, episode=episode)
    if rows > max_rows:
        raise LogError(f"declares {rows} rows (shape {shape}); expected at most {max_rows} "
                       f"(2**{max_rows.bit_length() - 1}) rows", file=file, key=key, episode=episode)
    per_row = 1
    for n in rest:
        per_row *= n
    if per_row > MAX_ROW_VALUES:
        raise LogError(f"declares {per_row} values per row (shape {shape}); expected at most "
                       f"{MAX_ROW_VALUES}", file=file, key=key, episode=episode)
    declared = rows * per_row * np.dtype(dtype).itemsize
    if max_bytes is not None and declared > max_bytes:
        raise LogError(f"declares shape {shape} of {np.dtype(dtype)} ({declared} bytes), more than "
                       f"the file can hold ({bound or f'at most {max_bytes} bytes'}); the file is "
                       f"damaged or not a log", file=file, key=key, episode=episode)


def h5_byte_bound(dsid, declared: int, file_size: int) -> tuple[int, str] | None:
    """The most data bytes an HDF5 dataset can hold in a file of ``file_size`` bytes.

    Returns None when ``declared`` fits in the file as it is (the cheap, usual case: no
    property list is looked at). Otherwise ``(bound, how)``: the file's size for unfiltered
    storage, the file's size times :data:`DEFLATE_MAX_RATIO` for filtered (compressed) chunks.
    """
    if declared <= file_size:
        return None
    try:
        nfilters = dsid.get_create_plist().get_nfilters()
    except Exception:                    # unreadable property list: treat as unfiltered
        nfilters = 0
    if nfilters == 0:
        return file_size, f"{file_size} bytes, stored uncompressed"
    return (file_size * DEFLATE_MAX_RATIO,
            f"{file_size} bytes x {DEFLATE_MAX_RATIO}, the most deflate can expand")
