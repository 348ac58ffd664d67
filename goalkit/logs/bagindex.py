"""Message times and raw messages of a bag read through its indexes, without parsing every record.

rosbags reads a bag record by record in Python. Two things goalkit needs can be had cheaper:

* the record times of a topic's messages (to cut episodes and place steps) are in the bag's
  indexes: a ROS 1 bag's index records (rosbags keeps them after opening), an MCAP file's
  message index records (one per chunk and channel: log time and offset of every message,
  MCAP specification, "Message Index" record), a ROS 2 SQLite bag's ``timestamp`` column
  (queried alone, without the message data);
* the raw messages of a few topics in a time window: of an MCAP file, the message index gives
  each message's offset in its decompressed chunk, so only the wanted records are sliced out;
  of a ROS 1 bag, the index records give chunk and offset, the chunk is decompressed once and
  the records are sliced out with numpy; of a ROS 2 SQLite bag, one query per topic on the
  indexed timestamp column, rows fetched at once.

Both return None when the bag is of another kind or lacks the indexes (an unindexed MCAP file,
messages compressed one by one); the caller then reads through rosbags' message loop. The order
is rosbags' own: per storage file in turn, messages by time (ties: by chunk, then by position
in the chunk; in a SQLite file by insertion).
"""

from __future__ import annotations

import struct

import numpy as np

from goalkit.logs.bagros1 import Ros1Bag

#: Switch for tests and measurements (rosbags' message loop is always correct, only slower).
ENABLED = True

_MSG_INDEX_HEAD = struct.Struct("<BQHI")     # op 0x07, record length, channel id, array length
_EMPTY = np.zeros(0, dtype=np.int64)


def _top(reader):
    """The rosbags reader of the single bag opened by ``reader`` (an AnyReader), or None."""
    readers = getattr(reader, "readers", None)
    if not ENABLED or not readers or len(readers) != 1:
        return None
    top = readers[0]
    return getattr(top, "storage", top)       # a ROS 2 reader wraps a storage (or a directory)


def _storage_list(top):
    """The storage files' readers of a ROS 2 bag, in order, or None."""
    if top is None:
        return None
    storages = getattr(top, "storages", None)
    if storages is None and _kind(top):
        storages = [top]
    return list(storages) if storages else None


def _kind(storage) -> str:
    name = type(storage).__name__
    return {"McapReader": "mcap", "Sqlite3Reader": "sqlite"}.get(name, "")


def _mcap_index(storage, chunk, cid):
    """(log_time, offset) pairs of channel ``cid`` in ``chunk``, as an (n, 2) uint64 array."""
    off = chunk.message_index_offsets.get(cid)
    if off is None:
        return None
    bio = storage.bio
    bio.seek(off)
    op, _, channel, size = _MSG_INDEX_HEAD.unpack(bio.read(_MSG_INDEX_HEAD.size))
    if op != 0x07 or channel != cid or size % 16:
        raise ValueError(f"bad message index record at byte {off}")
    return np.frombuffer(bio.read(size), dtype="<u8").reshape(-1, 2)


def _by_topic(storage, topics):
    ids = {}
    for c in storage.connections:
        if c.topic in topics:
            ids.setdefault(c.topic, []).append(c.id)
    return ids


def record_times(reader, topics) -> dict | None:
    """See :func:`_record_times`; None also when rosbags' reader objects lack the attributes
    read here (another rosbags release)."""
    try:
        return _record_times(reader, topics)
    except AttributeError:
        return None


def _record_times(reader, topics) -> dict | None:
    """Record times (int64 ns) of every message of each topic, in rosbags' read order.

    Parameters
    ----------
    reader : rosbags AnyReader
        An opened reader of one bag.
    topics : iterable of str

    Returns
    -------
    dict of str to ndarray, or None
        None when the bag's indexes cannot give the times (read the messages instead).
    """
    if isinstance(reader, Ros1Bag):                # goalkit's own ROS 1 index reader
        return reader.record_times(topics) if ENABLED else None
    top = _top(reader)
    if top is None:
        return None
    topics = set(topics)
    parts = {t: [] for t in topics}
    if type(top).__module__.startswith("rosbags.rosbag1") and hasattr(top, "indexes"):   # ROS 1
        for c in top.connections:
            if c.topic in topics:
                idx = top.indexes.get(c.id, [])
                parts[c.topic].append(np.fromiter((x.time for x in idx), dtype=np.int64, count=len(idx)))
        return {t: _sorted(v) for t, v in parts.items()}
    storages = _storage_list(top)
    if not storages:
        return None
    for st in storages:                                # split bags: one storage file after another
        kind = _kind(st)
        ids = _by_topic(st, topics)
        if kind == "mcap":
            if not st.chunks:
                return None                            # unindexed MCAP: no message indexes
            got = {t: [] for t in ids}
            for ch in st.chunks:
                for t, cids in ids.items():
                    for cid in cids:
                        pairs = _mcap_index(st, ch, cid)
                        if pairs is not None:
                            got[t].append(pairs[:, 0].copy())   # not the offsets too
            for t, v in got.items():
                if v:
                    parts[t].append(_sorted(v))           # uint64 log times < 2**63
        elif kind == "sqlite":
            got = _sqlite_times(st, ids)
            for t, v in got.items():
                parts[t].append(v)
        else:
            return None
    return {t: (v[0] if len(v) == 1 else np.concatenate(v)) if v else _EMPTY for t, v in parts.items()}


def _sorted(parts):
    """The parts joined and sorted in place as int64: one array of 8 bytes a message, no
    further copies (the times are the largest thing held while a bag is opened)."""
    if not parts:
        return _EMPTY
    a = parts[0].copy() if len(parts) == 1 else np.concatenate(parts)
    a = a.view(np.int64) if a.dtype == np.uint64 else a.astype(np.int64, copy=False)
    a.sort()
    return a


#: Rows of a SQLite bag read per query when taking the message times (a fixed buffer).
SQLITE_BLOCK = 1 << 16


def _sqlite_times(st, ids) -> dict:
    """Sorted record times of each topic (``{topic: connection ids}``) of one SQLite file.

    The messages table is walked in blocks of :data:`SQLITE_BLOCK` rows by its primary key;
    each block's (topic id, time) pairs come back as one text that numpy parses, so no Python
    object is made per message and the buffer is fixed. Falls back to one ordered query per
    topic when a block does not parse (a damaged or unusual file).
    """
    want = sorted({c for cids in ids.values() for c in cids})
    if not want:
        return {}
    marks = ",".join("?" * len(want))
    q = (f"SELECT max(id), sum(topic_id IN ({marks})), group_concat(CASE WHEN topic_id IN "
         f"({marks}) THEN topic_id || ',' || timestamp END) FROM (SELECT id, topic_id, timestamp "
         f"FROM messages WHERE id > ? ORDER BY id LIMIT ?)")
    parts = {t: [] for t in ids}
    last = -(1 << 63)
    try:
        while True:
            top, n, text = st.dbconn.execute(q, (*want, *want, last, SQLITE_BLOCK)).fetchone()
            if top is None:
                break
            last = top
            if not n:
                continue
            pairs = np.fromstring(text, dtype=np.int64, sep=",")
            if pairs.size != 2 * n:
                raise ValueError("block did not parse")
            pairs = pairs.reshape(-1, 2)
            for t, cids in ids.items():
                parts[t].append(pairs[np.isin(pairs[:, 0], cids), 1])
    except (ValueError, TypeError, DeprecationWarning):
        parts = {}
        for t, cids in ids.items():
            q = (f"SELECT timestamp FROM messages WHERE topic_id IN ({','.join('?' * len(cids))}) "
                 f"ORDER BY timestamp")
            rows = st.dbconn.execute(q, tuple(cids))          # streamed: no list of rows
            parts[t] = [np.fromiter((r[0] for r in rows), dtype=np.int64)]
    return {t: _sorted(v) for t, v in parts.items()}


class WindowReader:
    """Raw messages of some topics in time windows of one MCAP bag, sliced out of decompressed
    chunks through the message indexes. Keeps the last decompressed chunk (episodes are read in
    time order and often share a chunk at their boundary).

    Use :meth:`make`; it returns None for other bags.
    """

    def __init__(self, storages, topics):
        self.storages = storages
        self.topics = list(topics)
        self._cache = (None, None)

    @classmethod
    def make(cls, reader, topics):
        """A WindowReader for ``reader``'s bag, or None when it is not an indexed MCAP bag."""
        top = _top(reader)
        storages = _storage_list(top)
        meta = getattr(top, "metadata", None)
        if meta is not None and getattr(meta, "compression_mode", None) == "message":
            return None                    # each message zstd-compressed: rosbags unpacks them
        if not storages or any(_kind(st) != "mcap" or not st.chunks for st in storages):
            return None
        return cls(storages, topics)

    def _chunk(self, st, ch):
        from rosbags.rosbag2.storage_mcap import decompress

        key = (id(st), ch.chunk_start_offset)
        if self._cache[0] == key:
            return self._cache[1]
        bio = st.bio
        bio.seek(ch.chunk_start_offset + 9 + 24)
        (crc,) = struct.unpack("<I", bio.read(4))
        bio.seek(ch.chunk_start_offset + 9 + 40 + len(ch.compression))
        data = decompress(bio.read(ch.compressed_size), ch.compression, ch.uncompressed_size, crc)
        self._cache = (key, data)
        return data

    def window(self, lo: int, hi: int) -> dict:
        """``{topic: (times, raws)}`` of the messages with record time in ``[lo, hi]``.

        Parameters
        ----------
        lo, hi : int
            Inclusive window (ns).

        Returns
        -------
        dict of str to (ndarray, list of bytes)
        """
        times = {t: [] for t in self.topics}
        raws = {t: [] for t in self.topics}
        for st in self.storages:                      # split bags: one storage file after another
            ids = _by_topic(st, set(self.topics))
            keys = {t: [] for t in ids}
            datas = {t: [] for t in ids}
            for ch in st.chunks:
                if ch.message_end_time < lo or ch.message_start_time > hi:
                    continue
                for t, cids in ids.items():
                    for cid in cids:
                        pairs = _mcap_index(st, ch, cid)
                        if pairs is None or not pairs.size:
                            continue
                        ts = pairs[:, 0].astype(np.int64)
                        sel = (ts >= lo) & (ts <= hi)
                        if not sel.any():
                            continue
                        offs = pairs[sel, 1].astype(np.int64)
                        data = self._chunk(st, ch)
                        buf = np.frombuffer(data, dtype=np.uint8)
                        if np.any(offs + 31 > len(data)):
                            raise ValueError("message index points outside its chunk")
                        lens = buf[(offs + 1)[:, None] + np.arange(8)].view("<u8")[:, 0].astype(np.int64)
                        if np.any(buf[offs] != 0x05) or np.any(lens < 22) or np.any(offs + 9 + lens > len(data)):
                            raise ValueError("message index points outside its chunk's message records")
                        starts, ends = offs + 31, offs + 9 + lens
                        keys[t].append(np.stack([ts[sel], np.full(offs.size, ch.chunk_start_offset), offs]))
                        datas[t] += [data[a:b] for a, b in zip(starts.tolist(), ends.tolist())]
            for t, k in keys.items():
                if k:
                    k = np.concatenate(k, axis=1)
                    order = np.lexsort((k[2], k[1], k[0]))
                    times[t].append(k[0][order])
                    d = datas[t]
                    raws[t] += [d[i] for i in order.tolist()]
        return {t: (np.concatenate(times[t]) if times[t] else _EMPTY, raws[t]) for t in self.topics}


class SqliteWindows:
    """Raw messages of some topics in time windows of one ROS 2 SQLite bag: one query per topic
    and storage file on the indexed ``timestamp`` column, rows fetched at once (rosbags' loop
    joins the topics table and yields message by message). Order: by time, ties in insertion
    order (``id``), which is the order of rosbags' query through the timestamp index.

    Use :meth:`make`; it returns None for other bags.
    """

    def __init__(self, storages, topics):
        self.storages = storages
        self.topics = list(topics)
        self.ids = [_by_topic(st, set(self.topics)) for st in storages]

    @classmethod
    def make(cls, reader, topics):
        """A SqliteWindows for ``reader``'s bag, or None when it is not a SQLite bag whose
        messages are stored as they are (not compressed one by one)."""
        top = _top(reader)
        storages = _storage_list(top)
        meta = getattr(top, "metadata", None)
        if meta is None or getattr(meta, "compression_mode", None) == "message":
            return None
        if not storages or any(_kind(st) != "sqlite" for st in storages):
            return None
        return cls(storages, topics)

    def window(self, lo: int, hi: int) -> dict:
        """``{topic: (times, raws)}`` of the messages with record time in ``[lo, hi]``."""
        times = {t: [] for t in self.topics}
        raws = {t: [] for t in self.topics}
        for st, ids in zip(self.storages, self.ids):   # split bags: one storage file after another
            for t, cids in ids.items():
                q = (f"SELECT timestamp, data FROM messages WHERE topic_id IN "
                     f"({','.join('?' * len(cids))}) AND timestamp >= ? AND timestamp <= ? "
                     f"ORDER BY timestamp, id")
                rows = st.dbconn.execute(q, (*cids, lo, hi)).fetchall()
                if rows:
                    stamps, datas = zip(*rows)
                    times[t].append(np.array(stamps, dtype=np.int64))
                    raws[t] += datas
        return {t: (np.concatenate(times[t]) if times[t] else _EMPTY, raws[t]) for t in self.topics}


def _u32(buf, at):
    """Little-endian uint32 at each byte position of ``at`` in the uint8 array ``buf``."""
    return buf[at[:, None] + np.arange(4)].view("<u4")[:, 0].astype(np.int64)


def _ros1_records(data: bytes, offs: np.ndarray):
    """Data spans ``(starts, ends)`` of the message data records at ``offs`` of a decompressed
    ROS 1 chunk, or None when a record there is not a message data record (op 0x02; rosbags
    then skips connection records: its loop reads those windows).

    A record is a uint32 header length, the header (fields: uint32 length, then
    ``name=value``), a uint32 data length and the data (ROS bag format 2.0, "Records").
    """
    n = len(data)
    buf = np.frombuffer(data, dtype=np.uint8)
    if np.any(offs < 0) or np.any(offs + 4 > n):
        raise ValueError("index entry points outside its chunk")
    head = offs + 4
    end = head + _u32(buf, offs)
    if np.any(end + 4 > n):
        raise ValueError("record header runs past its chunk")
    op = np.full(offs.size, -1)
    pos = head.copy()
    for _ in range(64):                            # a few fields per header
        live = pos < end
        if not live.any():
            break
        p = pos[live]
        flen = _u32(buf, p)
        if np.any(p + 4 + flen > end[live]):
            raise ValueError("record header field runs past its header")
        name = buf[(p + 4)[:, None] + np.arange(3)]
        is_op = (flen == 4) & np.all(name == np.frombuffer(b"op=", dtype=np.uint8), axis=1)
        idx = np.flatnonzero(live)[is_op]
        op[idx] = buf[p[is_op] + 7]
        pos[live] = p + 4 + flen
    else:
        return None
    if np.any(op != 0x02):
        return None
    starts = end + 4
    ends = starts + _u32(buf, end)
    if np.any(ends > n):
        raise ValueError("message data runs past its chunk")
    return starts, ends


class Ros1Windows:
    """Raw messages of some topics in time windows of one ROS 1 bag opened by rosbags' own
    reader (only when :mod:`goalkit.logs.bagros1` is switched off: the reference path of its
    tests and benchmark).

    rosbags' ROS 1 reader walks its index from the bag's first message to the window's start
    on every call (time linear in the bag, so reading all episodes is quadratic), and parses
    every record in Python. Here each window cuts the per-connection index lists to the window
    by binary search, decompresses each chunk once and slices the message data records out of
    it with numpy (record headers parsed vectorised). Order: rosbags' own (per topic, the
    connections' sorted index lists merged by time, ties to the earlier connection). A window
    with a record that is not message data at an index entry is read through rosbags' loop on
    a private copy of its reader with the cut index.
    """

    def __init__(self, top, topics):
        import copy

        topics = list(topics)
        self.top = top
        self.conns = [c for c in top.connections if c.topic in set(topics)]
        self.full = {c.id: top.indexes.get(c.id, []) for c in self.conns}
        self.times = {cid: np.fromiter((x.time for x in idx), dtype=np.int64, count=len(idx))
                      for cid, idx in self.full.items()}
        self.topics = topics
        self.reader = copy.copy(top)       # its own index and current chunk; shares the file
        self._cache = (None, None)

    def _cut(self, lo, hi):
        cut = {}
        for cid, t in self.times.items():
            a, b = np.searchsorted(t, lo, "left"), np.searchsorted(t, hi, "right")
            cut[cid] = self.full[cid][int(a):int(b)]
        return cut

    def _chunk(self, pos):
        if self._cache[0] == pos:
            return self._cache[1]
        from rosbags.rosbag1.reader import read_bytes

        ch = self.top.chunks[pos]
        self.top.bio.seek(ch.datapos)
        data = ch.decompressor(read_bytes(self.top.bio, ch.datasize))
        self._cache = (pos, data)
        return data

    def window(self, lo: int, hi: int) -> dict:
        """``{topic: (times, raws)}`` of the messages with record time in ``[lo, hi]``."""
        cut = self._cut(lo, hi)
        topics = {t: [c for c in self.conns if c.topic == t] for t in self.topics}
        ent = {}                                       # topic -> (times, chunk positions, offsets)
        for t, conns in topics.items():
            parts = [cut[c.id] for c in conns]
            every = [x for part in parts for x in part]
            tm = np.fromiter((x.time for x in every), dtype=np.int64, count=len(every))
            if len(parts) > 1:                          # heapq.merge: by time, ties by connection
                order = np.argsort(tm, kind="stable")
                every = [every[i] for i in order.tolist()]
                tm = tm[order]
            ent[t] = (tm, np.fromiter((x.chunk_pos for x in every), dtype=np.int64, count=len(every)),
                      np.fromiter((x.offset for x in every), dtype=np.int64, count=len(every)))
        chunk_pos = np.concatenate([e[1] for e in ent.values()] + [_EMPTY])
        offs = np.concatenate([e[2] for e in ent.values()] + [_EMPTY])
        raws = np.empty(chunk_pos.size, dtype=object)
        for pos in np.unique(chunk_pos).tolist():      # each chunk decompressed once
            sel = np.flatnonzero(chunk_pos == pos)
            data = self._chunk(pos)
            spans = _ros1_records(data, offs[sel])
            if spans is None:
                return self._window_loop(cut)
            raws[sel] = [data[a:b] for a, b in zip(spans[0].tolist(), spans[1].tolist())]
        out, at = {}, 0
        for t, (tm, cp, _) in ent.items():
            out[t] = (tm, raws[at:at + cp.size].tolist())
            at += cp.size
        return out

    def _window_loop(self, cut):
        """The window read through rosbags' message loop over the cut index."""
        self.reader.indexes = cut
        times = {t: [] for t in self.topics}
        raws = {t: [] for t in self.topics}
        for c, t, raw in self.reader.messages(connections=self.conns):
            times[c.topic].append(t)
            raws[c.topic].append(raw)
        return {t: (np.asarray(times[t], dtype=np.int64), raws[t]) for t in self.topics}


def window_reader(reader, topics):
    """A reader of time windows for ``reader``'s bag (an indexed MCAP bag, a ROS 2 SQLite bag or
    a ROS 1 bag), or None (read windows through rosbags' message loop)."""
    if isinstance(reader, Ros1Bag):
        return reader.windows(topics) if ENABLED else None
    try:
        top = _top(reader)
        if top is not None and type(top).__module__.startswith("rosbags.rosbag1") and hasattr(top, "indexes"):
            return Ros1Windows(top, topics)
        return WindowReader.make(reader, topics) or SqliteWindows.make(reader, topics)
    except AttributeError:                 # another rosbags release: read through its loop
        return None
