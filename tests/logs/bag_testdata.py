"""Invented irrigation-gantry arm recordings written as real bags with rosbags' own writers.

Topics use standard message definitions: sensor_msgs/msg/JointState (joint angles in radians),
geometry_msgs/msg/PoseStamped (nozzle position in metres), std_msgs/msg/Float64MultiArray
(commands), sensor_msgs/msg/Image (rgb8), std_msgs/msg/Bool (recording marker). Units follow
ROS REP 103 "Standard Units of Measure and Coordinate Conventions" (Foote and Purvis, 2010):
metres, radians, seconds. Rates are chosen so that none divides another; message times carry
jitter and some messages are dropped.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from rosbags.rosbag1 import Writer as Writer1
from rosbags.rosbag2 import StoragePlugin, Writer as Writer2
from rosbags.typesys import Stores, get_typestore

JOINTS = "/gantry/joint_states"
TIP = "/gantry/nozzle_pose"
CMD = "/gantry/command"
CAM = "/gantry/camera"
REC = "/gantry/recording"
T0 = 1_700_000_000 * 10**9          # recording start, ns


def message_times(rng, rate, t_begin, t_end, jitter=0.3, drop=0.05):
    """Jittered, thinned, sorted message times (ns) at about ``rate`` Hz."""
    period = 1e9 / rate
    n = int((t_end - t_begin) / period)
    t = t_begin + np.arange(n) * period + rng.uniform(-jitter, jitter, n) * period
    t = t[rng.uniform(size=n) >= drop]
    return np.unique(np.clip(t, t_begin, t_end).astype(np.int64))


def make_truth(seed=0, segments=((0.0, 3.0),), rates=(173.0, 61.0, 47.0, 13.0), image=False,
               marker=None):
    """Message times and values of every topic, segments in seconds from T0."""
    rng = np.random.default_rng(seed)
    topics = {JOINTS: [], TIP: [], CMD: []} | ({CAM: []} if image else {})
    for a, b in segments:
        lo, hi = T0 + int(a * 1e9), T0 + int(b * 1e9)
        for topic, rate in zip(topics, rates):
            topics[topic].append(message_times(rng, rate, lo, hi))
    out = {}
    for topic, parts in topics.items():
        t = np.concatenate(parts)
        s = (t - T0) / 1e9
        if topic == JOINTS:      # two revolute joints, radians
            v = np.stack([0.8 * np.sin(1.3 * s), 0.5 * np.cos(0.7 * s) + 0.1 * s], axis=1)
        elif topic == TIP:       # nozzle x, y, z in metres
            v = np.stack([0.4 + 0.2 * np.sin(s), 0.3 * np.cos(0.9 * s), 0.25 + 0.01 * s], axis=1)
        elif topic == CMD:       # three commanded velocities
            v = np.stack([np.sin(2 * s), np.cos(3 * s), rng.uniform(-1, 1, s.size)], axis=1)
        else:                    # 6 x 8 rgb images
            v = rng.integers(0, 256, size=(s.size, 6, 8, 3), dtype=np.uint8)
        out[topic] = (t, v)
    if marker is not None:       # (seconds, bool) pairs
        out[REC] = (np.array([T0 + int(a * 1e9) for a, _ in marker], dtype=np.int64),
                    np.array([x for _, x in marker], dtype=bool))
    return out


def _messages(ts, topic, times, values, ros1):
    T = ts.types
    stamp = lambda t: T["builtin_interfaces/msg/Time"](sec=int(t // 10**9), nanosec=int(t % 10**9))
    def header(t):
        if ros1:
            return T["std_msgs/msg/Header"](seq=0, stamp=stamp(t), frame_id="bench")
        return T["std_msgs/msg/Header"](stamp=stamp(t), frame_id="bench")
    for t, v in zip(times, values):
        if topic == JOINTS:
            yield T["sensor_msgs/msg/JointState"](header=header(t), name=["carriage", "boom"],
                                                   position=np.asarray(v, dtype=np.float64),
                                                   velocity=np.zeros(2), effort=np.zeros(0))
        elif topic == TIP:
            P = T["geometry_msgs/msg/Point"](x=float(v[0]), y=float(v[1]), z=float(v[2]))
            Q = T["geometry_msgs/msg/Quaternion"](x=0.0, y=0.0, z=0.0, w=1.0)
            yield T["geometry_msgs/msg/PoseStamped"](header=header(t),
                                                     pose=T["geometry_msgs/msg/Pose"](position=P, orientation=Q))
        elif topic == CMD:
            lay = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
            yield T["std_msgs/msg/Float64MultiArray"](layout=lay, data=np.asarray(v, dtype=np.float64))
        elif topic == CAM:
            h, w, _ = v.shape
            yield T["sensor_msgs/msg/Image"](header=header(t), height=h, width=w, encoding="rgb8",
                                             is_bigendian=0, step=w * 3, data=v.reshape(-1).copy())
        else:
            yield T["std_msgs/msg/Bool"](data=bool(v))


TYPES = {JOINTS: "sensor_msgs/msg/JointState", TIP: "geometry_msgs/msg/PoseStamped",
         CMD: "std_msgs/msg/Float64MultiArray", CAM: "sensor_msgs/msg/Image", REC: "std_msgs/msg/Bool"}


def write_bag(path, truth, kind="mcap", encoding=None, delay_seed=None, header_edit=None, garbage=None,
              compression=None, chunk_bytes=None):
    """Write ``truth`` as a bag: kind ``"mcap"`` or ``"sqlite"`` (ROS 2) or ``"ros1"``.

    ROS 1 only: ``compression`` ("bz2" or "lz4") compresses the chunks, ``chunk_bytes`` sets
    the writer's chunk size (many chunks in a small bag).

    The truth's times are the header stamps; the record times are the same, or later by a
    random 0-4 ms transport delay (``delay_seed``). ``header_edit(topic, times)`` changes the
    stamps written; ``garbage`` is a topic whose third message is written as junk bytes.
    """
    path = Path(path)
    ros1 = kind == "ros1"
    ts = get_typestore(Stores.ROS1_NOETIC if ros1 else Stores.ROS2_HUMBLE)
    if ros1:
        writer = Writer1(path)
        if compression:
            writer.set_compression(getattr(Writer1.CompressionFormat, compression.upper()))
        if chunk_bytes:
            writer.chunk_threshold = chunk_bytes
    else:
        writer = Writer2(path, version=9 if kind == "mcap" else 8,
                         storage_plugin=StoragePlugin.MCAP if kind == "mcap" else StoragePlugin.SQLITE3)
    ser = ts.serialize_ros1 if ros1 else ts.serialize_cdr
    with writer:
        events = []
        for topic, (times, values) in truth.items():
            conn = writer.add_connection(topic, TYPES[topic], typestore=ts)
            stamps = times if header_edit is None else header_edit(topic, times.copy())
            rec = times
            if delay_seed is not None:
                rec = times + np.random.default_rng([delay_seed, len(events)]).integers(0, 4_000_000, times.size)
            for i, (t, msg) in enumerate(zip(rec, _messages(ts, topic, stamps, values, ros1))):
                if encoding and topic == CAM:
                    msg.encoding = encoding
                raw = ser(msg, TYPES[topic])
                if topic == garbage and i == 2:
                    raw = bytes(raw[:6])
                events.append((int(t), conn, raw))
        events.sort(key=lambda x: x[0])
        for t, conn, raw in events:
            writer.write(conn, t, raw)
    return path


LAYOUT = {
    "shape": "bag",
    "keys": {"action": f"{CMD}:data"},
    "fields": {"joints": f"{JOINTS}:position", "nozzle": f"{TIP}:pose.position"},
    "bag": {"step_topic": CMD, "align": {JOINTS: "interpolate", TIP: "nearest", CMD: "latest"}},
}
