"""Lazy access to the arrays of a ``.npz`` file: shapes from headers, rows read by slice.

``np.load`` on a ``.npz`` reads a whole member on access. For a large flat log we need
rows ``a:b`` of one member only, so this module parses each member's ``.npy`` header with
numpy's own format functions and then reads just the requested bytes: by seeking in the file
for stored (uncompressed) members, and by a kept-open decompressing stream for deflated ones
(cheap for the forward, chunk-by-chunk reads a build does). Object arrays are refused, as with
``np.load(..., allow_pickle=False)``.

Before a member is read, its declared shape is checked (see :mod:`goalkit.logs.limits`):
against the row and width limits, and against the member's uncompressed size in the zip
directory (which must hold the declared data); a deflated member may not claim to expand more
than deflate can. Damaged archives (bad zip structure, a corrupt deflate stream, a CRC
mismatch) become one LogError naming the file and the member.
"""

from __future__ import annotations

import io
import os
import re
import struct
import zipfile
import zlib
from dataclasses import dataclass

import numpy as np

from goalkit.errors import LogError
from goalkit.logs import limits

#: What reading a damaged archive raises.
_ZIP_ERRORS = (zipfile.BadZipFile, zlib.error, OSError, EOFError, ValueError, struct.error,
               NotImplementedError, RuntimeError)


@dataclass(frozen=True)
class Member:
    """One array of a .npz file: its header and where its data starts."""

    name: str
    shape: tuple
    dtype: np.dtype
    fortran: bool
    data_start: int        # byte offset of the data inside the (decompressed) member
    stored: bool           # ZIP_STORED: data can be read by seeking in the file
    file_offset: int       # stored only: absolute byte offset of the member's first byte


#: Files up to this size are read whole, once, when opened: their stored members are then parsed
#: and read from memory (per-episode files are small; a flat log is read by slices).
WHOLE_BYTES = 1 << 20
#: The header numpy writes (``numpy.lib.format``: a dict literal with the keys in this order,
#: padded with spaces to a multiple of 64 bytes with the preamble, ending in a newline), for a
#: plain (non-structured) dtype; any other header is parsed by numpy's own function.
_HEADER = re.compile(r"\{'descr': '([<>|=][a-zA-Z]\d*)', 'fortran_order': (True|False), "
                     r"'shape': \(((?:\d+, ?)*\d*)\), \}\s*\Z")
_MAGIC = b"\x93NUMPY"


def _quick_header(raw: bytes, at: int):
    """``(shape, fortran, dtype, data start)`` of the ``.npy`` whose first byte is ``raw[at]``,
    for the header numpy writes; None for anything else (then numpy's parser reads it)."""
    if raw[at:at + 6] != _MAGIC or len(raw) < at + 12:
        return None
    major = raw[at + 6]
    if major == 1:
        (size,), start = struct.unpack_from("<H", raw, at + 8), at + 10
    elif major in (2, 3):
        (size,), start = struct.unpack_from("<I", raw, at + 8), at + 12
    else:
        return None
    if len(raw) < start + size:
        return None
    found = _HEADER.match(raw[start:start + size].decode("latin1"))
    if found is None:
        return None
    descr, fortran, dims = found.groups()
    try:
        dtype = np.dtype(descr)
    except TypeError:
        return None
    shape = tuple(int(d) for d in dims.replace(" ", "").split(",") if d)
    return shape, fortran == "True", dtype, start + size - at


def _local_header_size(fh, header_offset: int) -> int:
    fh.seek(header_offset)
    head = fh.read(30)
    if len(head) != 30 or head[:4] != b"PK\x03\x04":
        raise ValueError("bad local file header")
    name_len, extra_len = struct.unpack("<HH", head[26:30])
    return 30 + name_len + extra_len


class NpzArrays:
    """The arrays of one ``.npz`` file, read lazily.

    Parameters
    ----------
    path : str
        The file.
    max_rows : int
        Most rows of one array (:data:`~goalkit.logs.limits.MAX_LOG_ROWS` for a flat log,
        :data:`~goalkit.logs.limits.MAX_EPISODE_STEPS` for an episode file).
    episode : int, optional
        The episode the file holds (errors about its arrays name it).

    Raises
    ------
    LogError
        When the file is missing or not a regular file, is not a zip archive, a member is not a
        valid ``.npy``, or declares a shape the limits or the archive cannot hold.
    """

    def __init__(self, path, max_rows=limits.MAX_LOG_ROWS, episode=None):
        self.path = str(path)
        self._streams = {}
        self.episode = episode
        self._whole = None
        limits.regular_file(self.path, what="an .npz file")
        try:
            with open(self.path, "rb") as fh:
                if os.fstat(fh.fileno()).st_size <= WHOLE_BYTES:
                    self._whole = fh.read()
            zf = zipfile.ZipFile(self.path if self._whole is None else io.BytesIO(self._whole))
        except _ZIP_ERRORS as exc:
            raise LogError(f"cannot open as .npz (expected a zip archive of .npy arrays): {exc}",
                           file=self.path) from None
        self.members = {}
        self._sizes = {}
        with zf, (open(self.path, "rb") if self._whole is None else io.BytesIO(self._whole)) as fh:
            for info in zf.infolist():
                if not info.filename.endswith(".npy"):
                    continue
                name = info.filename[:-4]
                quick = self._quick_member(info, name)
                if quick is not None:
                    self.members[name] = quick
                    self._sizes[name] = (info, max_rows)
                    continue
                try:
                    with zf.open(info) as f:
                        version = np.lib.format.read_magic(f)
                        if version == (1, 0):
                            shape, fortran, dtype = np.lib.format.read_array_header_1_0(f)
                        else:
                            shape, fortran, dtype = np.lib.format.read_array_header_2_0(f)
                        data_start = f.tell()
                    stored = info.compress_type == zipfile.ZIP_STORED
                    offset = info.header_offset + _local_header_size(fh, info.header_offset) if stored else 0
                except _ZIP_ERRORS as exc:
                    raise LogError(f"not a readable .npy array inside the .npz, the file may be corrupt "
                                   f"({exc})",
                                   file=self.path, key=name, episode=episode) from None
                self.members[name] = Member(name, tuple(shape), np.dtype(dtype), bool(fortran),
                                            data_start, stored, offset)
                self._sizes[name] = (info, max_rows)

    def _quick_member(self, info, name):
        """The member parsed straight from the file's bytes (a stored member of a file read whole,
        with the header numpy writes), else None (then read through zipfile and numpy)."""
        raw = self._whole
        if raw is None or info.compress_type != zipfile.ZIP_STORED:
            return None
        at = info.header_offset
        if raw[at:at + 4] != b"PK\x03\x04" or len(raw) < at + 30:
            return None
        name_len, extra_len = struct.unpack_from("<HH", raw, at + 26)
        offset = at + 30 + name_len + extra_len
        found = _quick_header(raw, offset)
        if found is None:
            return None
        shape, fortran, dtype, data_start = found
        return Member(name, shape, dtype, fortran, data_start, True, offset)

    def _member(self, name) -> Member:
        """The member, its declared shape checked on first use (arrays never asked for are not)."""
        m = self.members[name]
        if name in self._sizes:
            info, max_rows = self._sizes[name]
            self._check_member(info, name, m.shape, m.dtype, m.data_start, max_rows)
            del self._sizes[name]
        return m

    def _check_member(self, info, name, shape, dtype, data_start, max_rows):
        """Refuse a declared shape the limits or the zip directory's sizes cannot hold."""
        if dtype.hasobject:                  # refused when read; its size means nothing
            limits.check_declared(shape, np.dtype(np.uint8), max_rows=max_rows, max_bytes=None,
                                  file=self.path, key=name, episode=self.episode)
            return
        held = max(int(info.file_size) - int(data_start), 0)
        how = f"the zip directory gives the member {held} bytes of data"
        if info.compress_type != zipfile.ZIP_STORED and info.file_size > (
                info.compress_size * limits.DEFLATE_MAX_RATIO + 1024):
            held = int(info.compress_size) * limits.DEFLATE_MAX_RATIO
            how = (f"its {info.compress_size} compressed bytes expand to at most {held} "
                   f"(x {limits.DEFLATE_MAX_RATIO}, the most deflate can)")
        limits.check_declared(shape, dtype, max_rows=max_rows, max_bytes=held, bound=how,
                              file=self.path, key=name, episode=self.episode)

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_streams"] = {}
        state["_whole"] = None
        return state

    def close(self):
        """Close kept-open decompressing streams (and drop the bytes of a file read whole)."""
        self._whole = None
        for zf, f in self._streams.values():
            f.close()
            zf.close()
        self._streams = {}

    def __contains__(self, name):
        return name in self.members

    def keys(self) -> list[str]:
        """Names of the arrays."""
        return list(self.members)

    def shape(self, name) -> tuple:
        """Shape of array ``name``."""
        return self._member(name).shape

    def dtype(self, name) -> np.dtype:
        """Dtype of array ``name``."""
        return self._member(name).dtype

    def read(self, name, start=None, stop=None) -> np.ndarray:
        """Return rows ``start:stop`` (default all) of array ``name`` along the first axis."""
        m = self._member(name)
        if m.dtype.hasobject:
            raise LogError("expected a numeric array, got an object array (not loaded: "
                           "pickled data is refused)", file=self.path, key=name, episode=self.episode)
        if len(m.shape) == 0:
            return self._read_bytes(m, 0, m.dtype.itemsize).reshape(())
        n = m.shape[0]
        start = 0 if start is None else max(0, min(int(start), n))
        stop = n if stop is None else max(start, min(int(stop), n))
        if m.fortran and len(m.shape) > 1:
            return self._read_fortran(m)[start:stop]
        row_items = int(np.prod(m.shape[1:], dtype=np.int64))
        row_bytes = row_items * m.dtype.itemsize
        flat = self._read_bytes(m, start * row_bytes, (stop - start) * row_bytes)
        return flat.reshape((stop - start,) + m.shape[1:])

    def _read_fortran(self, m: Member) -> np.ndarray:
        try:
            with zipfile.ZipFile(self.path) as zf, zf.open(m.name + ".npy") as f:
                return np.lib.format.read_array(f, allow_pickle=False)
        except _ZIP_ERRORS as exc:
            raise LogError(f"cannot read the array, the file may be truncated or corrupt ({exc})",
                           file=self.path, key=m.name, episode=self.episode) from None

    def _read_bytes(self, m: Member, offset: int, nbytes: int) -> np.ndarray:
        if nbytes == 0:
            return np.empty(0, dtype=m.dtype)
        if m.stored and self._whole is not None:
            begin = m.file_offset + m.data_start + offset
            buf = self._whole[begin:begin + nbytes]
        elif m.stored:
            try:
                with open(self.path, "rb") as fh:
                    fh.seek(m.file_offset + m.data_start + offset)
                    buf = fh.read(nbytes)
            except OSError as exc:
                raise LogError(f"cannot read the array ({exc.strerror})", file=self.path, key=m.name,
                               episode=self.episode) from None
        else:
            buf = self._read_deflated(m, offset, nbytes)
        if len(buf) != nbytes:
            raise LogError(f"file is truncated: expected {nbytes} bytes of data at byte {offset}, "
                           f"got {len(buf)}", file=self.path, key=m.name, episode=self.episode)
        return np.frombuffer(buf, dtype=m.dtype).copy()

    def _read_deflated(self, m: Member, offset: int, nbytes: int) -> bytes:
        pos = m.data_start + offset
        entry = self._streams.get(m.name)
        if entry is not None and entry[1].tell() > pos:   # going back: restart the stream
            entry[1].close()
            entry[0].close()
            entry = None
        try:
            if entry is None:
                zf = zipfile.ZipFile(self.path)
                entry = (zf, zf.open(m.name + ".npy"))
                self._streams[m.name] = entry
            f = entry[1]
            f.seek(pos)
            return f.read(nbytes)
        except _ZIP_ERRORS as exc:
            self._streams.pop(m.name, None)
            raise LogError(f"cannot read compressed data, the file may be corrupt ({exc})",
                           file=self.path, key=m.name, episode=self.episode) from None
