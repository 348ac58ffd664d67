"""Decode the fields of many raw messages of one topic at once when their layout is fixed.

Deserialising every message with rosbags costs most of a bag read. When every raw message of a
topic has the same length and the same bytes before the wanted fields (apart from the header
stamp, and a ROS 1 header's sequence number), the messages have the same structure up to those
fields (CDR and ROS 1 serialisation are parsed front to back, and only lengths and strings
change the structure), so each field sits at the same byte offset in every message. The offset
is found in one message that rosbags decoded (the field's bytes must occur exactly once in it);
the values are then one numpy view over all messages. Anything else returns None and the caller
decodes message by message.
"""

from __future__ import annotations

import numpy as np

#: Switch for tests and measurements (the per-message path is always correct, only slower).
ENABLED = True


def _all_float64(typestore, msgtype) -> bool:
    fields = typestore.fielddefs.get(msgtype, ((), ()))[1]
    return bool(fields) and all(f[1][0].name == "BASE" and f[1][1][0] == "float64" for f in fields)


def fixed_layout_values(raws, proto, refs, typestore, *, ros1: bool, header: bool):
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

    Returns
    -------
    dict of str to ndarray, or None
    """
    if not ENABLED or not raws or not refs:
        return None
    first = raws[0]
    n, size = len(raws), len(first)
    if not ros1 and (len(first) < 4 or first[1] != 1):          # little-endian CDR only
        return None
    lengths = np.fromiter(map(len, raws), dtype=np.int64, count=n)
    if np.any(lengths != size):
        return None
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
    arr = np.frombuffer(b"".join(raws), dtype=np.uint8).reshape(n, size)
    end = max(off for off, _, _ in spans)
    varying = np.any(arr[:, :end] != arr[0, :end], axis=0)
    if header:
        varying[(0 if ros1 else 4):12] = False
    if varying.any():
        return None
    return {ref.text: np.ascontiguousarray(arr[:, off:off + w * dt.itemsize]).view(dt).reshape(n, w)
            for ref, (off, dt, w) in zip(refs, spans)}
