"""Decode many raw messages of one type with rosbags' generated deserialiser, called directly.

rosbags' ``Typestore.deserialize_cdr`` / ``deserialize_ros1`` look the type's definition up,
check the CDR encapsulation header and the consumed length on every call, around the generated
function that does the decoding. Here the definition is looked up once, the headers and lengths
of all messages are checked with numpy, and the generated function is called in one list
comprehension: the same message objects, with less work per message. Anything unusual (a
big-endian or malformed header, a length that does not match, an exception) returns None and
the caller decodes message by message through rosbags' own entry point, which names the error.
"""

from __future__ import annotations

import gc
from operator import itemgetter

import numpy as np

_MSG, _POS = itemgetter(0), itemgetter(1)


def decode_all(raws, typestore, msgtype: str, *, ros1: bool, pick=None):
    """The decoded messages of ``raws`` (all of type ``msgtype``), or what ``pick`` takes from
    each, or None.

    Parameters
    ----------
    raws : list of bytes
        Raw messages (CDR with its 4-byte encapsulation header for ROS 2, ROS 1 serialisation
        otherwise).
    typestore : rosbags Typestore
    msgtype : str
    ros1 : bool
    pick : callable, optional
        Applied to each message as soon as it is decoded; the message itself is then dropped
        (no million live message objects for the cyclic collector to walk).

    Returns
    -------
    list, or None
        Equal to ``[pick(typestore.deserialize_cdr(r, msgtype)) for r in raws]`` (or
        ``deserialize_ros1``; without ``pick`` the messages); None when that would raise or a
        check here fails.
    """
    n = len(raws)
    if n == 0:
        return []
    try:
        msgdef = typestore.get_msgdef(msgtype)
        lens = np.fromiter(map(len, raws), dtype=np.int64, count=n)
        cls = msgdef.cls
        # many small objects and no cycles: the cyclic collector would rescan them all again
        # and again while the list grows (about a fifth of the decoding time)
        collect = gc.isenabled()
        gc.disable()
        try:
            if ros1:
                f = msgdef.deserialize_ros1
                pairs = ([f(r, 0, cls, typestore) for r in raws] if pick is None else
                         [(pick(m), p) for m, p in (f(r, 0, cls, typestore) for r in raws)])
            else:
                if lens.min() < 4:
                    return None
                buf = np.frombuffer(b"".join(raws), dtype=np.uint8)
                starts = np.cumsum(lens) - lens
                if np.any(buf[starts] != 0) or np.any(buf[starts + 1] != 1):   # little-endian CDR
                    return None
                f = msgdef.deserialize_cdr_le
                pairs = ([f(r[4:], 0, cls, typestore) for r in raws] if pick is None else
                         [(pick(m), p) for m, p in (f(r[4:], 0, cls, typestore) for r in raws)])
        finally:
            if collect:
                gc.enable()
    except Exception:            # rosbags' own entry point names the message and the error
        return None
    pos = np.fromiter(map(_POS, pairs), dtype=np.int64, count=n)
    # the size checks of rosbags' deserialize_ros1 (exact) and deserialize_cdr (up to 3 bytes
    # of final padding after the 4-byte header)
    if np.any(pos != lens) if ros1 else np.any(pos + 4 + 3 < lens):
        return None
    return list(map(_MSG, pairs))
