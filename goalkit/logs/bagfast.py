"""Decode the fields of many raw messages of one topic at once when their layout is fixed.

Deserialising every message with rosbags costs most of a bag read. When every raw message of a
topic has the same length and the same bytes before the wanted fields (apart from the header
stamp, and a ROS 1 header's sequence number), the messages have the same structure up to those
fields (CDR and ROS 1 serialisation are parsed front to back, and only lengths and strings
change the structure), so each field sits at the same byte offset in every message. The offset
is found in one message that rosbags decoded (the field's bytes must occur exactly once in it);
the values are then one numpy view over all messages. Messages of a few layouts (joint names or
a frame id that change from message to message) are grouped: each layout is taken from one
decoded message of it and its messages share the offsets. Anything else returns None and the
caller decodes message by message.
"""

from __future__ import annotations

import numpy as np

#: Switch for tests and measurements (the per-message path is always correct, only slower).
ENABLED = True


def _all_float64(typestore, msgtype) -> bool:
    fields = typestore.fielddefs.get(msgtype, ((), ()))[1]
    return bool(fields) and all(f[1][0].name == "BASE" and f[1][1][0] == "float64" for f in fields)


def _spans(first, proto, refs, typestore):
    """Byte offset, dtype and width of each ref's value in the raw message ``first`` (decoded:
    ``proto``), or None when a value's bytes are not found exactly once."""
    spans = []
    for ref in refs:
        v = ref.getter(proto)
        if isinstance(v, np.ndarray) and v.ndim == 1 and v.dtype.kind in "iuf" and v.size:
            a = v.astype(v.dtype.newbyteorder("<"))
        elif isinstance(v, tuple):
            parent = proto
            for part in ref.path.split("."):
                parent = getattr(parent, part) if part else parent
            if not _all_float64(typestore, getattr(parent, "__msgtype__", "")):
                return None
            a = np.asarray(v, dtype="<f8")
        else:
            return None
        b = a.tobytes()
        off = first.find(b)
        if off < 0 or first.rfind(b) != off:
            return None
        spans.append((off, a.dtype, a.size))
    return spans


def _same_layout(raws, first, spans, *, ros1: bool, header: bool):
    """Which of ``raws`` (all as long as ``first``) share ``first``'s bytes before the last
    wanted field (apart from the header's stamp and sequence number), and the messages as an
    (n, size) uint8 array."""
    arr = np.frombuffer(b"".join(raws), dtype=np.uint8).reshape(len(raws), len(first))
    end = max(off for off, _, _ in spans)
    ref = np.frombuffer(first, dtype=np.uint8)[:end]
    diff = arr[:, :end] != ref
    if header:
        diff[:, (0 if ros1 else 4):12] = False
    return ~diff.any(axis=1), arr


def _values(arr, spans):
    return [np.ascontiguousarray(arr[:, off:off + w * dt.itemsize]).view(dt).reshape(arr.shape[0], w)
            for off, dt, w in spans]


def fixed_layout_values(raws, proto, refs, typestore, *, ros1: bool, header: bool, decode=None,
                        max_layouts: int = 8):
    """Values of ``refs`` for every raw message, or None when the layout is not provably fixed.

    Parameters
    ----------
    raws : list of bytes
        The topic's raw messages (CDR for ROS 2, ROS 1 serialisation otherwise).
    proto : message
        ``raws[0]`` decoded by rosbags.
    refs : list of Ref
        Fields wanted (getter, path).
    typestore : rosbags Typestore
        The bag's types (to check that a point-like field is all float64).
    ros1 : bool
        ROS 1 serialisation (no encapsulation header).
    header : bool
        The type starts with std_msgs/Header (its stamp, and a ROS 1 sequence number, vary).
    decode : callable, optional
        ``decode(i)`` returns ``raws[i]`` decoded. Given, the messages may fall into up to
        ``max_layouts`` layouts (for example joint names or a frame id that change from message
        to message): each layout is found from one decoded message of it, and its messages are
        read as one numpy view, as above.
    max_layouts : int

    Returns
    -------
    dict of str to ndarray, or None
    """
    if not ENABLED or not raws or not refs:
        return None
    n = len(raws)
    if not ros1 and any(len(r) < 4 or r[1] != 1 for r in (raws[0],)):   # little-endian CDR only
        return None
    lengths = np.fromiter(map(len, raws), dtype=np.int64, count=n)
    if np.all(lengths == lengths[0]):
        spans = _spans(raws[0], proto, refs, typestore)
        if spans is None and decode is None:
            return None
        if spans is not None:
            same, arr = _same_layout(raws, raws[0], spans, ros1=ros1, header=header)
            if same.all():
                return {ref.text: v for ref, v in zip(refs, _values(arr, spans))}
            if decode is None:
                return None
    if decode is None:
        return None
    out = None
    left = np.arange(n)
    for _ in range(max_layouts):
        if not left.size:
            break
        # the layout from one message of it; values that also occur elsewhere in it (zeros
        # at the start of a recording) hide a field's place: try a few more of that length
        pool = left[lengths[left] == lengths[left[0]]]
        spans = None
        for i in dict.fromkeys(pool[np.linspace(0, pool.size - 1, min(pool.size, 4)).astype(int)].tolist()):
            first = raws[i]
            if not ros1 and (len(first) < 4 or first[1] != 1):
                return None
            try:
                msg = proto if i == 0 else decode(i)
            except Exception:              # the per-message path names the broken message
                return None
            spans = _spans(first, msg, refs, typestore)
            if spans is not None:
                break
        if spans is None:
            return None
        cand = left[lengths[left] == len(first)]
        same, arr = _same_layout([raws[j] for j in cand.tolist()], first, spans, ros1=ros1, header=header)
        members = cand[same]
        vals = _values(arr[same], spans)
        if out is None:
            out = [np.empty((n,) + v.shape[1:], dtype=v.dtype) for v in vals]
        if any(o.dtype != v.dtype or o.shape[1:] != v.shape[1:] for o, v in zip(out, vals)):
            return None                    # widths differ: the per-message path says where
        for o, v in zip(out, vals):
            o[members] = v
        keep = np.ones(left.size, dtype=bool)
        keep[np.searchsorted(left, members)] = False
        left = left[keep]
    if left.size:
        return None
    return {ref.text: v for ref, v in zip(refs, out)}
