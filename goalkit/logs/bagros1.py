"""ROS 1 bags read through their own index, one chunk at a time; messages decoded by rosbags.

rosbags' ROS 1 reader parses a bag's whole index when it opens it and keeps one Python object
per message (time, chunk, offset): well over 100 bytes a message, so memory grows with the bag.
Here opening keeps one small entry per chunk (where its data and its index records are, the
first and last time in it) and per connection; the index records of a chunk are read again,
as numpy arrays, when its messages are wanted. Message times of a few topics are 8 bytes a
message (:meth:`Ros1Bag.record_times`); messages of a time window are sliced out of their
decompressed chunks (one kept) with numpy. Decoding stays with rosbags: the typestore is built
from the bag's message definitions as rosbags' AnyReader builds it, and the messages go
through rosbags' own deserialiser.

Format (ROS bag format version 2.0, ROS wiki page "Bags/Format/2.0"; cited from memory): the
file starts with the line ``#ROSBAG V2.0``, then records. A record is a uint32 header length,
the header (fields: a uint32 length, then ``name=value``), a uint32 data length and the data;
numbers are little-endian, a time is uint32 seconds then uint32 nanoseconds. The header field
``op`` gives the kind:

* 0x03 bag header: ``index_pos`` (uint64, where the connection and chunk info records start),
  ``conn_count``, ``chunk_count`` (uint32); the data is padding;
* 0x05 chunk: ``compression`` (none, bz2, lz4), ``size`` (uint32, uncompressed); the data holds
  message data and connection records; after each chunk, one index data record per
  connection in it;
* 0x04 index data: ``ver`` (1), ``conn``, ``count``; the data is ``count`` times (time, uint32
  offset of the message data record in the uncompressed chunk);
* 0x07 connection: ``conn``, ``topic``; the data is a header-like block (``type``, ``md5sum``,
  ``message_definition``, optionally ``callerid`` and ``latching``);
* 0x06 chunk info: ``ver`` (1), ``chunk_pos`` (uint64), ``start_time``, ``end_time``,
  ``count``; the data is ``count`` times (uint32 connection, uint32 message count);
* 0x02 message data: ``conn``, ``time``; the data is the serialised message.

Order of messages: rosbags' own, so that everything downstream sees the same sequence: by time;
ties by the connection's place in the list asked for, then by chunk (in chunk info order), then
by place in the chunk's index record.
"""

from __future__ import annotations

import bz2
import os
import struct

import numpy as np

from goalkit.errors import LogError

try:
    from lz4.frame import LZ4FrameDecompressor as _lz4
except ImportError:  # pragma: no cover - rosbags itself needs lz4
    _lz4 = None

#: Switch for tests and measurements: False reads ROS 1 bags through rosbags' own reader.
ENABLED = True

MAGIC = b"#ROSBAG V2.0\n"
OP_MSG, OP_BAG, OP_INDEX, OP_CHUNK, OP_INFO, OP_CONN = 0x02, 0x03, 0x04, 0x05, 0x06, 0x07
_INDEX_ENTRY = np.dtype([("sec", "<u4"), ("nsec", "<u4"), ("off", "<u4")])
_U32 = struct.Struct("<I")
_EMPTY = np.zeros(0, dtype=np.int64)
#: Largest record header read (a connection's message definition is the largest usual one).
MAX_HEADER = 1 << 24
#: Largest uncompressed chunk accepted (ROS writers make chunks of about 1 MiB).
MAX_CHUNK = 1 << 31


class BadBag(ValueError):
    """A bag that does not follow the format; ``where`` is a byte offset or a time."""


def _normalize_topic(name: str) -> str:
    # as rosbags normalises ROS 1 topic names (repeated slashes dropped)
    return ("/" if name.startswith("/") else "") + "/".join(x for x in name.split("/") if x)


def _fields(head: bytes, at: int) -> dict:
    """``{name: value bytes}`` of a record header (``head``), which started at byte ``at``."""
    out, pos = {}, 0
    while pos < len(head):
        if pos + 4 > len(head):
            raise BadBag(f"record header at byte {at} ends inside a field length")
        (size,) = _U32.unpack_from(head, pos)
        pos += 4
        if pos + size > len(head):
            raise BadBag(f"record header at byte {at} has a field of {size} bytes running past its end")
        name, sep, value = head[pos:pos + size].partition(b"=")
        if not sep:
            raise BadBag(f"record header at byte {at} has a field without '='")
        out[name.decode("utf-8", "replace")] = value
        pos += size
    return out


def _u(fields, name, fmt, at):
    try:
        return struct.unpack(fmt, fields[name])[0]
    except (KeyError, struct.error):
        raise BadBag(f"record at byte {at} lacks a valid '{name}' field") from None


def _time(fields, name, at):
    try:
        sec, nsec = struct.unpack("<II", fields[name])
    except (KeyError, struct.error):
        raise BadBag(f"record at byte {at} lacks a valid '{name}' field") from None
    return sec * 1_000_000_000 + nsec


def _u32s(buf, at):
    """Little-endian uint32 at each byte position ``at`` of the uint8 array ``buf``."""
    return buf[at[:, None] + np.arange(4)].view("<u4")[:, 0].astype(np.int64)


def message_spans(data: bytes, offs: np.ndarray, conns: np.ndarray, times: np.ndarray):
    """Data spans ``(starts, ends)`` of the message data records at ``offs`` of an uncompressed
    chunk, each checked to be op 0x02 with the connection and time its index entry gives;
    connection records at an offset are stepped over (as rosbags does).

    Raises
    ------
    BadBag
        With ``.entry`` the position (in ``offs``) of the first entry that fails.
    """
    n = len(data)
    buf = np.frombuffer(data, dtype=np.uint8)
    pos = offs.astype(np.int64)
    starts = np.zeros(pos.size, dtype=np.int64)
    ends = np.zeros(pos.size, dtype=np.int64)
    todo = np.arange(pos.size)
    op_name, conn_name, time_name = (np.frombuffer(b, dtype=np.uint8) for b in (b"op=", b"conn=", b"time="))

    def fail(mask, what):
        if mask.any():
            i = int(todo[np.argmax(mask)])
            err = BadBag(f"{what} (record at byte {int(pos[np.argmax(mask)])} of the uncompressed chunk)")
            err.entry = i
            raise err

    for _ in range(1 << 16):                      # connection records stepped over, if any
        if not todo.size:
            break
        p = pos
        fail((p < 0) | (p + 4 > n), "index entry points outside its chunk")
        head = p + 4
        end = head + _u32s(buf, p)
        fail(end + 4 > n, "record header runs past its chunk")
        op = np.full(p.size, -1)
        conn = np.full(p.size, -1)
        when = np.full(p.size, -1)
        q = head.copy()
        for _ in range(64):                       # a few fields per header
            live = q < end
            if not live.any():
                break
            r = q[live]
            flen = _u32s(buf, r)
            bad = np.zeros(p.size, dtype=bool)
            bad[live] = r + 4 + flen > end[live]
            fail(bad, "record header field runs past its header")
            name = buf[np.minimum((r + 4)[:, None] + np.arange(5), n - 1)]
            idx = np.flatnonzero(live)
            is_op = (flen == 4) & np.all(name[:, :3] == op_name, axis=1)
            op[idx[is_op]] = buf[r[is_op] + 7]
            is_conn = (flen == 9) & np.all(name == conn_name, axis=1)
            conn[idx[is_conn]] = _u32s(buf, r[is_conn] + 9)
            is_time = (flen == 13) & np.all(name == time_name, axis=1)
            rt = r[is_time] + 9
            when[idx[is_time]] = _u32s(buf, rt) * 1_000_000_000 + _u32s(buf, rt + 4)
            q[live] = r + 4 + flen
        else:
            fail(np.ones(p.size, dtype=bool), "record header has too many fields")
        dlen = _u32s(buf, end)
        skip = op == OP_CONN
        msg = op == OP_MSG
        fail(~(skip | msg), "expected a message data record (op 0x02) at an index entry")
        got = np.flatnonzero(msg)
        s = end[got] + 4
        fail_at = np.zeros(p.size, dtype=bool)
        fail_at[got] = s + dlen[got] > n
        fail(fail_at, "message data runs past its chunk")
        fail_at[got] = (conn[got] != conns[todo[got]]) | (when[got] != times[todo[got]])
        fail(fail_at, "message data record disagrees with its index entry (connection or time)")
        starts[todo[got]] = s
        ends[todo[got]] = s + dlen[got]
        pos = end[skip] + 4 + dlen[skip]
        todo = todo[skip]
    else:
        raise BadBag("too many connection records at an index entry")
    return starts, ends


class Ros1Bag:
    """An opened ROS 1 bag (format 2.0): connections, message times and raw messages, read
    through the bag's own index; decoding with rosbags' typestore.

    Offers what goalkit reads from a rosbags ``AnyReader`` (``connections``, ``topics``,
    ``typestore``, ``is2``, ``start_time``, ``messages``, ``deserialize``, ``close``) plus
    :meth:`record_times` and :meth:`windows`. Use :func:`open_bag`.
    """

    is2 = False

    def __init__(self, path, default_typestore=None):
        self.path = str(path)
        self.default_typestore = default_typestore
        self.f = None
        self.connections = []
        self.chunks = []        # per chunk: (pos, datapos, datasize, compression, size, tmin, tmax, entries)
        self._info_start = []   # chunk info start times (what rosbags takes as the bag's start)
        self._cache = (None, None)

    # ---- opening ---------------------------------------------------------------------------
    def _read(self, at: int, size: int, what: str) -> bytes:
        if at < 0 or at + size > self.size:
            raise BadBag(f"{what} at byte {at} declares {size} bytes; the file ends at byte "
                         f"{self.size} (truncated bag?)")
        self.f.seek(at)
        data = self.f.read(size)
        if len(data) != size:
            raise BadBag(f"{what} at byte {at}: the file ends early (truncated bag?)")
        return data

    def _record_header(self, at: int, expect: int | None, what: str):
        """(fields, byte after the header) of the record at ``at``."""
        (hlen,) = _U32.unpack(self._read(at, 4, what))
        if hlen > MAX_HEADER:
            raise BadBag(f"{what} at byte {at} declares a {hlen}-byte header; expected at most {MAX_HEADER}")
        fields = _fields(self._read(at + 4, hlen, what), at)
        if expect is not None:
            op = fields.get("op", b"")
            if len(op) != 1:
                raise BadBag(f"record at byte {at} has no op field; expected a {what} (op 0x{expect:02x})")
            if op[0] != expect:
                raise BadBag(f"record at byte {at} has op 0x{op[0]:02x}; expected a {what} (op 0x{expect:02x})")
        return fields, at + 4 + hlen

    def _data_len(self, at: int, what: str, rec: int) -> int:
        """The data length of the record at byte ``rec`` (its field is at ``at``)."""
        (n,) = _U32.unpack(self._read(at, 4, what))
        if at + 4 + n > self.size:
            raise BadBag(f"{what} at byte {rec} declares {n} bytes of data; the file ends at byte "
                         f"{self.size} (truncated bag?)")
        return n

    def open(self):
        """Read the bag header, connections, chunk infos and each chunk's index record headers."""
        self.f = open(self.path, "rb")
        try:
            self.size = os.fstat(self.f.fileno()).st_size
            self._open()
        except BaseException:
            self.close()
            raise

    def _open(self):
        first = self.f.read(len(MAGIC))
        if first != MAGIC:
            raise BadBag(f"first line is {first[:12]!r}; expected a ROS 1 bag of format 2.0 (#ROSBAG V2.0)")
        fields, end = self._record_header(len(MAGIC), OP_BAG, "bag header record")
        index_pos = _u(fields, "index_pos", "<Q", len(MAGIC))
        conn_count = _u(fields, "conn_count", "<I", len(MAGIC))
        chunk_count = _u(fields, "chunk_count", "<I", len(MAGIC))
        if fields.get("encryptor"):
            raise BadBag(f"is encrypted ({fields['encryptor'].decode('utf-8', 'replace')}); expected a plain bag")
        if index_pos == 0:
            raise BadBag("has no index (index_pos = 0: the recording was not closed); expected an indexed bag")
        if not end <= index_pos < self.size:
            raise BadBag(f"bag header gives index_pos {index_pos}; the file ends at byte {self.size} "
                         f"(truncated bag?)")
        at = index_pos
        raw_conns = []
        for _ in range(conn_count):
            rec = at
            fields, at = self._record_header(at, OP_CONN, "connection record")
            n = self._data_len(at, "connection record", rec)
            info = _fields(self._read(at + 4, n, "connection record"), at)
            raw_conns.append((fields, info, at))
            at += 4 + n
        infos = []
        for _ in range(chunk_count):
            start = at
            fields, at = self._record_header(at, OP_INFO, "chunk info record")
            if _u(fields, "ver", "<I", start) != 1:
                raise BadBag(f"chunk info record at byte {start} has version "
                             f"{_u(fields, 'ver', '<I', start)}; expected 1")
            pos = _u(fields, "chunk_pos", "<Q", start)
            count = _u(fields, "count", "<I", start)
            t_start = _time(fields, "start_time", start) if count else (1 << 63) - 1
            n = self._data_len(at, "chunk info record", start)
            if n != 8 * count:
                raise BadBag(f"chunk info record at byte {start} holds {n} bytes for {count} connections; "
                             f"expected {8 * count}")
            pairs = np.frombuffer(self._read(at + 4, n, "chunk info record"), dtype="<u4").reshape(-1, 2)
            at += 4 + n
            infos.append((pos, count, t_start, pairs))
        self._make_connections(raw_conns, infos)
        known = {c.id for c in self.connections}
        for pos, count, t_start, pairs in infos:
            self._info_start.append(t_start)
            self.chunks.append(self._chunk_entry(pos, count, pairs, known))

    def _make_connections(self, raw_conns, infos):
        from rosbags.interfaces import Connection, ConnectionExtRosbag1, MessageDefinition, MessageDefinitionFormat
        from rosbags.typesys.msg import normalize_msgtype

        counts = {}
        for _, _, _, pairs in infos:
            for cid, n in pairs.tolist():
                counts[cid] = counts.get(cid, 0) + n
        for fields, info, at in raw_conns:
            cid = _u(fields, "conn", "<I", at)
            try:
                topic = _normalize_topic(fields["topic"].decode())
                typ = info["type"].decode()
                md5 = info["md5sum"].decode()
                text = info["message_definition"].decode()
            except (KeyError, UnicodeDecodeError):
                raise BadBag(f"connection record at byte {at} lacks topic, type, md5sum or "
                             f"message_definition") from None
            caller = info["callerid"].decode("utf-8", "replace") if "callerid" in info else None
            latch = info.get("latching")
            latch = int(latch) if latch not in (None, b"") and latch.strip().isdigit() else None
            self.connections.append(Connection(cid, topic, normalize_msgtype(typ),
                                               MessageDefinition(MessageDefinitionFormat.MSG, text),
                                               md5, counts.get(cid, 0), ConnectionExtRosbag1(caller, latch),
                                               self))
        self.typestore = _typestore(self.connections, self.default_typestore)

    def _chunk_entry(self, pos, count, pairs, known):
        """A chunk's place, compression and index records; its first and last message time,
        read from its index records (not taken on trust from the chunk info)."""
        fields, at = self._record_header(pos, OP_CHUNK, "chunk record")
        comp = fields.get("compression", b"").decode("utf-8", "replace")
        if comp not in ("none", "bz2", "lz4"):
            raise BadBag(f"chunk at byte {pos} is compressed with '{comp}'; expected none, bz2 or lz4")
        usize = _u(fields, "size", "<I", pos)
        if usize > MAX_CHUNK:
            raise BadBag(f"chunk at byte {pos} declares {usize} uncompressed bytes; expected at most {MAX_CHUNK}")
        datasize = self._data_len(at, "chunk record", pos)
        datapos = at + 4
        at = datapos + datasize
        entries = []
        tmin, tmax = (1 << 63) - 1, -1
        want = dict(pairs.tolist())
        for _ in range(count):
            start = at
            fields, at = self._record_header(at, OP_INDEX, "index data record")
            if _u(fields, "ver", "<I", start) != 1:
                raise BadBag(f"index data record at byte {start} has version "
                             f"{_u(fields, 'ver', '<I', start)}; expected 1")
            cid = _u(fields, "conn", "<I", start)
            n = _u(fields, "count", "<I", start)
            size = self._data_len(at, "index data record", start)
            if size != 12 * n:
                raise BadBag(f"index data record at byte {start} holds {size} bytes for {n} messages; "
                             f"expected {12 * n}")
            if cid not in known or want.get(cid) != n:
                raise BadBag(f"index data record at byte {start} gives {n} messages of connection "
                             f"{cid}; the chunk info of the chunk at byte {pos} says "
                             f"{want.get(cid, 'none')}")
            if n:
                idx = np.frombuffer(self._read(at + 4, size, "index data record"), dtype=_INDEX_ENTRY)
                t = idx["sec"].astype(np.int64) * 1_000_000_000 + idx["nsec"]
                tmin, tmax = min(tmin, int(t.min())), max(tmax, int(t.max()))
                if int(idx["off"].max()) >= usize:
                    raise BadBag(f"index data record at byte {start} points past the end of the chunk "
                                 f"at byte {pos} ({usize} bytes uncompressed)")
            entries.append((cid, n, at + 4))
            at += 4 + size
        return (pos, datapos, datasize, comp, usize, tmin, tmax, entries)

    def close(self):
        """Close the file."""
        f, self.f = self.f, None
        self._cache = (None, None)
        if f is not None:
            f.close()

    # ---- what rosbags' AnyReader offers ----------------------------------------------------
    @property
    def topics(self) -> dict:
        """``{topic: rosbags TopicInfo}``."""
        from rosbags.interfaces import MessageDefinition, MessageDefinitionFormat, TopicInfo

        out = {}
        for topic in sorted({c.topic for c in self.connections}):
            cs = [c for c in self.connections if c.topic == topic]
            types, defs = {c.msgtype for c in cs}, {c.msgdef for c in cs}
            out[topic] = TopicInfo(types.pop() if len(types) == 1 else None,
                                   defs.pop() if len(defs) == 1 else MessageDefinition(MessageDefinitionFormat.NONE, ""),
                                   sum(c.msgcount for c in cs), cs)
        return out

    @property
    def start_time(self) -> int:
        """The earliest chunk start time (ns), as rosbags reports it."""
        return min(self._info_start, default=(1 << 63) - 1)

    def deserialize(self, raw, msgtype):
        """One message decoded by rosbags' typestore."""
        return self.typestore.deserialize_ros1(raw, msgtype)

    # ---- index reading ---------------------------------------------------------------------
    def _index(self, entry):
        """The index entries of one index data record, as a structured array."""
        cid, n, pos = entry
        return np.frombuffer(self._read(pos, 12 * n, "index data record"), dtype=_INDEX_ENTRY)

    def record_times(self, topics) -> dict:
        """Record times (int64 ns, sorted) of every message of each topic in ``topics``.

        Parameters
        ----------
        topics : iterable of str

        Returns
        -------
        dict of str to ndarray
            8 bytes a message: each topic's array is sized from the index record headers and
            filled one chunk at a time.
        """
        topics = set(topics)
        of = {c.id: c.topic for c in self.connections if c.topic in topics}
        total = {t: 0 for t in topics}
        for ch in self.chunks:
            for cid, n, _ in ch[7]:
                if cid in of:
                    total[of[cid]] += n
        out = {t: np.empty(n, dtype=np.int64) for t, n in total.items()}
        fill = dict.fromkeys(topics, 0)
        for ch in self.chunks:
            for e in ch[7]:
                t = of.get(e[0])
                if t is None or not e[1]:
                    continue
                idx = self._index(e)
                a = fill[t]
                out[t][a:a + e[1]] = idx["sec"].astype(np.int64) * 1_000_000_000 + idx["nsec"]
                fill[t] = a + e[1]
        for a in out.values():
            if a.size > 1 and np.any(a[1:] < a[:-1]):
                a.sort()
        return out

    def _gather(self, ids, rank, lo, stop):
        """Entries of connections ``rank`` (``{id: place}``) in chunks ``ids`` with time in
        ``[lo, stop)``, in rosbags' order: arrays time, connection id, chunk, offset."""
        parts = []
        for k in ids:
            ch = self.chunks[k]
            for e in ch[7]:
                if e[0] not in rank or not e[1]:
                    continue
                idx = self._index(e)
                t = idx["sec"].astype(np.int64) * 1_000_000_000 + idx["nsec"]
                sel = np.flatnonzero((t >= lo) & (t < stop))
                if sel.size:
                    parts.append((t[sel], np.full(sel.size, e[0], dtype=np.int64),
                                  np.full(sel.size, rank[e[0]], dtype=np.int64), np.full(sel.size, k, dtype=np.int64),
                                  sel.astype(np.int64), idx["off"][sel].astype(np.int64)))
        if not parts:
            return _EMPTY, _EMPTY, _EMPTY, _EMPTY
        t, cid, rk, chunk, seq, off = (np.concatenate(x) for x in zip(*parts))
        order = np.lexsort((seq, chunk, rk, t))
        return t[order], cid[order], chunk[order], off[order]

    def _chunk_data(self, k):
        if self._cache[0] == k:
            return self._cache[1]
        pos, datapos, datasize, comp, usize = self.chunks[k][:5]
        self._cache = (None, None)          # the kept chunk freed before the next is read
        raw = self._read(datapos, datasize, "chunk record")
        try:
            if comp == "none":
                data = raw
            else:                           # never more than the header's size is made
                if comp == "lz4" and _lz4 is None:
                    raise BadBag(f"chunk at byte {pos} is lz4-compressed; reading it needs the lz4 "
                                 f"package (pip install lz4)")
                d = bz2.BZ2Decompressor() if comp == "bz2" else _lz4()
                data = d.decompress(raw, max_length=usize)
                if not d.eof:
                    raise BadBag(f"chunk at byte {pos} decompresses to more than the {usize} bytes "
                                 f"its header gives, or its compressed data is cut short")
        except BadBag:
            raise
        except Exception as exc:            # bz2 and lz4 raise their own types on damaged data
            raise BadBag(f"chunk at byte {pos} does not decompress ({comp}: {exc})") from None
        if len(data) != usize:
            raise BadBag(f"chunk at byte {pos} decompresses to {len(data)} bytes; its header says {usize}")
        self._cache = (k, data)
        return data

    def _raws(self, t, cid, chunk, off, topic_of):
        """The raw messages of the gathered entries, in their order; each chunk decompressed once."""
        raws = np.empty(t.size, dtype=object)
        for k in np.unique(chunk).tolist():
            sel = np.flatnonzero(chunk == k)
            data = self._chunk_data(k)
            try:
                starts, ends = message_spans(data, off[sel], cid[sel], t[sel])
            except BadBag as exc:
                i = sel[getattr(exc, "entry", 0)]
                exc.args = (f"{exc.args[0]} in the chunk at byte {self.chunks[k][0]}, message at "
                            f"t = {(int(t[i]) - self.start_time) / 1e9:.3f} s into the bag",)
                exc.topic = topic_of.get(int(cid[i]))
                raise
            raws[sel] = [data[a:b] for a, b in zip(starts.tolist(), ends.tolist())]
        return raws

    def _overlapping(self, ids, lo, stop):
        return [k for k in ids if self.chunks[k][6] >= lo and self.chunks[k][5] < stop]

    def window(self, topics, lo: int, hi: int) -> dict:
        """``{topic: (times, raws)}`` of the messages of ``topics`` with time in ``[lo, hi]``.

        Reads the index records of the chunks that overlap the window, then each such chunk
        once (the last one is kept: episodes read in time order share their boundary chunk).
        """
        conns = [c for c in self.connections if c.topic in set(topics)]
        rank = {c.id: i for i, c in enumerate(conns)}
        topic_of = {c.id: c.topic for c in conns}
        ks = self._overlapping(range(len(self.chunks)), lo, hi + 1)
        t, cid, chunk, off = self._gather(ks, rank, lo, hi + 1)
        raws = self._raws(t, cid, chunk, off, topic_of)
        out = {}
        for topic in topics:
            sel = np.isin(cid, [c.id for c in conns if c.topic == topic])
            out[topic] = (t[sel], raws[sel].tolist())
        return out

    def windows(self, topics):
        """An object whose ``window(lo, hi)`` reads :meth:`window` for ``topics``."""
        return Ros1ChunkWindows(self, list(topics))

    def messages(self, connections=(), start=None, stop=None):
        """``(connection, time, raw)`` of every message of ``connections`` (all when empty) with
        time in ``[start, stop)``, in rosbags' order.

        Chunks are taken in groups that overlap in time (usually one chunk a group): memory is
        one group's messages, not the bag's.
        """
        conns = list(connections) or list(self.connections)
        rank = {c.id: i for i, c in enumerate(conns)}
        by_id = {c.id: c for c in self.connections}
        topic_of = {c.id: c.topic for c in conns}
        lo = -(1 << 63) if start is None else int(start)
        hi = (1 << 63) - 1 if stop is None else int(stop)
        ks = [k for k in self._overlapping(range(len(self.chunks)), lo, hi)
              if any(e[0] in rank and e[1] for e in self.chunks[k][7])]
        ks.sort(key=lambda k: (self.chunks[k][5], k))
        i = 0
        while i < len(ks):
            j, reach = i + 1, self.chunks[ks[i]][6]
            while j < len(ks) and self.chunks[ks[j]][5] <= reach:     # overlaps the group: join it
                reach = max(reach, self.chunks[ks[j]][6])
                j += 1
            t, cid, chunk, off = self._gather(sorted(ks[i:j]), rank, lo, hi)
            raws = self._raws(t, cid, chunk, off, topic_of)
            for c, tm, raw in zip(cid.tolist(), t.tolist(), raws.tolist()):
                yield by_id[c], tm, raw
            i = j


class Ros1ChunkWindows:
    """Time windows of some topics of a :class:`Ros1Bag` (see :meth:`Ros1Bag.window`)."""

    def __init__(self, bag, topics):
        self.bag, self.topics = bag, topics

    def window(self, lo, hi):
        return self.bag.window(self.topics, lo, hi)


def _typestore(connections, default):
    """A typestore with the bag's message definitions, built as rosbags' AnyReader builds it
    (the standard types of ``default`` when the bag has none); checks each type's md5 sum."""
    from rosbags.typesys import Stores, get_types_from_msg, get_typestore

    typs, digests = {}, {}
    defs = [c for c in connections if c.msgdef.data]
    for c in defs:
        try:
            typs.update(get_types_from_msg(c.msgdef.data, c.msgtype))
        except Exception as exc:            # rosbags' parser raises its own types
            first = (str(exc).strip().splitlines() or [""])[0][:160]
            err = BadBag(f"message definition of {c.msgtype} does not parse ({type(exc).__name__}: {first})")
            err.topic = c.topic
            raise err from None
        if c.digest:
            digests[c.msgtype] = (c.digest, c.topic)
    if not defs and default is not None:
        typs.update(default.fielddefs)
    store = get_typestore(Stores.EMPTY)
    store.register(typs)
    for msgtype, (digest, topic) in digests.items():
        have = store.generate_msgdef(msgtype)[1]
        if have != digest:
            err = BadBag(f"message type {msgtype} has md5 sum {digest} in the bag; its definition gives {have}")
            err.topic = topic
            raise err
    return store


def as_log_error(exc: BadBag, path, episode=None) -> LogError:
    """The one-line error for a damaged bag."""
    return LogError(exc.args[0], file=path, key=getattr(exc, "topic", None), episode=episode)


def open_bag(path, default_typestore=None) -> Ros1Bag:
    """An opened :class:`Ros1Bag`.

    Raises
    ------
    LogError
        When the file is not a ROS 1 bag of format 2.0 or is damaged (one line with the byte
        offset, and the topic when known).
    """
    bag = Ros1Bag(path, default_typestore)
    try:
        bag.open()
    except BadBag as exc:
        raise as_log_error(exc, path) from None
    return bag
