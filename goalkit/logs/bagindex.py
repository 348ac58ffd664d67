"""Message times and raw messages of a bag read through its indexes, without parsing every record.

rosbags reads a bag record by record in Python. Two things goalkit needs can be had cheaper:

* the record times of a topic's messages (to cut episodes and place steps) are in the bag's
  indexes: a ROS 1 bag's index records (rosbags keeps them after opening), an MCAP file's
  message index records (one per chunk and channel: log time and offset of every message,
  MCAP specification, "Message Index" record), a ROS 2 SQLite bag's ``timestamp`` column
  (queried alone, without the message data);
* the raw messages of a few topics in a time window of an MCAP file: the message index gives
  each message's offset in its decompressed chunk, so only the wanted records are sliced out;
  of a ROS 1 bag: rosbags reads them, from an index cut to the window.

Both return None when the bag is of another kind or lacks the indexes (an unindexed MCAP file,
messages compressed one by one); the caller then reads through rosbags' message loop (a ROS 2
SQLite bag's window is one SQL query on the indexed timestamp column, already cheap). The order is rosbags' own: per storage file
in turn, messages by time (ties: by chunk, then by position in the chunk).
"""

from __future__ import annotations

import struct

import numpy as np

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
        return {t: np.sort(np.concatenate(v)) if v else _EMPTY for t, v in parts.items()}
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
                            got[t].append(pairs[:, 0])
            for t, v in got.items():
                if v:
                    parts[t].append(np.sort(np.concatenate(v).astype(np.int64)))
        elif kind == "sqlite":
            for t, cids in ids.items():
                q = (f"SELECT timestamp FROM messages WHERE topic_id IN ({','.join('?' * len(cids))}) "
                     f"ORDER BY timestamp")
                rows = st.dbconn.execute(q, tuple(cids))          # streamed: no list of rows
                parts[t].append(np.fromiter((r[0] for r in rows), dtype=np.int64))
        else:
            return None
    return {t: np.concatenate(v) if v else _EMPTY for t, v in parts.items()}


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


class Ros1Windows:
    """Raw messages of some topics in time windows of one ROS 1 bag.

    rosbags' ROS 1 reader walks its index from the bag's first message to the window's start
    on every call (time linear in the bag, so reading all episodes is quadratic); here each
    window reads a private copy of the reader whose per-connection index lists are cut to the
    window by binary search, so rosbags parses only the window's records, in its own order.
    """

    def __init__(self, top, topics):
        import copy

        self.conns = [c for c in top.connections if c.topic in set(topics)]
        self.full = {c.id: top.indexes.get(c.id, []) for c in self.conns}
        self.times = {cid: np.fromiter((x.time for x in idx), dtype=np.int64, count=len(idx))
                      for cid, idx in self.full.items()}
        self.topics = list(topics)
        self.reader = copy.copy(top)       # its own index and current chunk; shares the file

    def window(self, lo: int, hi: int) -> dict:
        """``{topic: (times, raws)}`` of the messages with record time in ``[lo, hi]``."""
        cut = {}
        for cid, t in self.times.items():
            a, b = np.searchsorted(t, lo, "left"), np.searchsorted(t, hi, "right")
            cut[cid] = self.full[cid][int(a):int(b)]
        self.reader.indexes = cut
        times = {t: [] for t in self.topics}
        raws = {t: [] for t in self.topics}
        for c, t, raw in self.reader.messages(connections=self.conns):
            times[c.topic].append(t)
            raws[c.topic].append(raw)
        return {t: (np.asarray(times[t], dtype=np.int64), raws[t]) for t in self.topics}


def window_reader(reader, topics):
    """A reader of time windows for ``reader``'s bag (an indexed MCAP bag or a ROS 1 bag), or
    None (read windows through rosbags' message loop)."""
    try:
        top = _top(reader)
        if top is not None and type(top).__module__.startswith("rosbags.rosbag1") and hasattr(top, "indexes"):
            return Ros1Windows(top, topics)
        return WindowReader.make(reader, topics)
    except AttributeError:                 # another rosbags release: read through its loop
        return None
