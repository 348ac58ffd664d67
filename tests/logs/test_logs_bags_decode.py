"""The bag reading paths added for speed give what rosbags' own reader gives.

Bags are written with rosbags' own writers (ROS 2 MCAP and SQLite, ROS 1) from standard message
definitions (bag_testdata.py); the reference is rosbags' ``Typestore.deserialize_cdr`` /
``deserialize_ros1`` on the raw messages of rosbags' ``AnyReader.messages`` loop.
"""

import pickle
from pathlib import Path

import numpy as np
import pytest

from bag_testdata import CAM, CMD, JOINTS, LAYOUT, TIP, make_truth, write_bag
from goalkit.logs import bagindex, open_logs
from goalkit.logs.bagdecode import decode_all
from goalkit.logs.bagfile import open_reader

rosbags = pytest.importorskip("rosbags")

TOPICS = [JOINTS, TIP, CMD, CAM]


def _bag(tmp_path, kind, seed=11):
    truth = make_truth(seed=seed, segments=((0.0, 1.5), (2.5, 4.0)), image=True)
    return write_bag(tmp_path / ("rec.bag" if kind == "ros1" else "rec"), truth, kind, delay_seed=seed)


def _same(a, b):
    """Two decoded messages hold the same values (field by field, arrays by value)."""
    assert type(a) is type(b)
    fields = [f for f in getattr(a, "__dataclass_fields__", {}) if f != "__msgtype__"]
    if not fields:
        if isinstance(a, np.ndarray):
            assert a.dtype == b.dtype
            np.testing.assert_array_equal(a, b)
        else:
            assert a == b
        return
    for f in fields:
        x, y = getattr(a, f), getattr(b, f)
        if isinstance(x, list):
            assert len(x) == len(y)
            for u, v in zip(x, y):
                _same(u, v)
        else:
            _same(x, y)


@pytest.mark.parametrize("kind", ["mcap", "sqlite", "ros1"])
def test_decode_all_equals_rosbags_deserialisation(tmp_path, kind):
    bag = _bag(tmp_path, kind)
    reader = open_reader(Path(bag))
    try:
        store = reader.typestore
        one = store.deserialize_cdr if reader.is2 else store.deserialize_ros1
        for topic in TOPICS:
            conns = [c for c in reader.connections if c.topic == topic]
            raws = [bytes(raw) for _, _, raw in reader.messages(connections=conns)]
            assert len(raws) > 10
            got = decode_all(raws, store, conns[0].msgtype, ros1=not reader.is2)
            assert got is not None and len(got) == len(raws)
            for m, raw in zip(got, raws):
                _same(m, one(raw, conns[0].msgtype))
    finally:
        reader.close()


def test_decode_all_leaves_unusual_messages_to_rosbags(tmp_path):
    """Big-endian CDR, a cut message, trailing bytes: None (the caller then decodes one by one
    through rosbags, which decodes big-endian and names the broken message)."""
    from rosbags.typesys import Stores, get_typestore

    ts = get_typestore(Stores.ROS2_HUMBLE)
    T = ts.types
    lay = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
    msg = T["std_msgs/msg/Float64MultiArray"](layout=lay, data=np.array([1.0, -2.5, 3.0]))
    le = bytes(ts.serialize_cdr(msg, "std_msgs/msg/Float64MultiArray"))
    be = bytes(ts.serialize_cdr(msg, "std_msgs/msg/Float64MultiArray", little_endian=False))
    name = "std_msgs/msg/Float64MultiArray"
    assert decode_all([le, le], ts, name, ros1=False) is not None
    assert decode_all([le, be], ts, name, ros1=False) is None
    np.testing.assert_array_equal(ts.deserialize_cdr(be, name).data, [1.0, -2.5, 3.0])
    assert decode_all([le, le[:-9]], ts, name, ros1=False) is None
    assert decode_all([le, le + bytes(8)], ts, name, ros1=False) is None
    assert decode_all([le[:3]], ts, name, ros1=False) is None
    assert decode_all([], ts, name, ros1=False) == []
    ts1 = get_typestore(Stores.ROS1_NOETIC)
    raw1 = bytes(ts1.serialize_ros1(msg, name))
    assert decode_all([raw1], ts1, name, ros1=True)[0].data.tolist() == [1.0, -2.5, 3.0]
    assert decode_all([raw1 + b"\0"], ts1, name, ros1=True) is None


@pytest.mark.parametrize("kind", ["mcap", "sqlite", "ros1"])
def test_per_message_reading_equals_rosbags_loop_values(tmp_path, monkeypatch, kind):
    """Episodes read message by message (the fixed-layout path off) hold the values of
    rosbags' own loop + deserialisation, aligned by an independent numpy alignment."""
    import goalkit.logs.bagfast as fast

    monkeypatch.setattr(fast, "ENABLED", False)
    bag = _bag(tmp_path, kind, seed=12)
    lay = {**LAYOUT, "bag": {**LAYOUT["bag"], "episodes": "gap", "cut_gap": 0.5}}
    src = open_logs(bag, lay)
    es = src.read(0, src.num_episodes)
    reader = open_reader(Path(bag))
    try:
        one = reader.typestore.deserialize_cdr if reader.is2 else reader.typestore.deserialize_ros1
        ref = {}
        for topic in (JOINTS, CMD):
            conns = [c for c in reader.connections if c.topic == topic]
            ts, vs = [], []
            for c, t, raw in reader.messages(connections=conns):
                m = one(raw, c.msgtype)
                ts.append(t)
                vs.append(m.position if topic == JOINTS else m.data)
            ref[topic] = (np.asarray(ts), np.asarray(vs))
    finally:
        reader.close()
    # commands aligned "latest" at the steps (the command messages themselves): numpy's
    # searchsorted, written out here apart from goalkit.logs.align
    steps = src.windows[0][1]
    t, v = ref[CMD]
    want = v[np.searchsorted(t, steps[:-1], side="right") - 1]
    np.testing.assert_array_equal(es.actions[:steps.size - 1], want)
    assert src.num_episodes == 2


@pytest.mark.parametrize("kind", ["sqlite", "ros1", "mcap"])
def test_the_kept_bag_gives_the_same_reads_and_is_not_pickled(tmp_path, kind):
    bag = _bag(tmp_path, kind, seed=13)
    lay = {**LAYOUT, "bag": {**LAYOUT["bag"], "episodes": "gap", "cut_gap": 0.5}}
    src = open_logs(bag, lay)
    assert src._kept is not None                     # the bag opened to plan is kept
    first = src.read(0, 2)
    again = [src.read(1, 2), src.read(0, 1)]         # out of order, through the kept reader
    np.testing.assert_array_equal(again[1].observations, first.observations[:again[1].observations.shape[0]])
    np.testing.assert_array_equal(again[0].actions, first.actions[-again[0].actions.shape[0]:])
    copy = pickle.loads(pickle.dumps(src))
    assert copy._kept is None
    np.testing.assert_array_equal(copy.read(0, 2).observations, first.observations)
    src.close()
    assert src._kept is None
    np.testing.assert_array_equal(src.read(0, 2).actions, first.actions)   # reopened
    src.close()


def test_sqlite_times_in_small_blocks_equal_the_message_loop(tmp_path, monkeypatch):
    bag = _bag(tmp_path, "sqlite", seed=14)
    monkeypatch.setattr(bagindex, "SQLITE_BLOCK", 7)       # many blocks, some without a topic
    reader = open_reader(Path(bag))
    try:
        got = bagindex.record_times(reader, [JOINTS, CAM])
        for topic in (JOINTS, CAM):
            conns = [c for c in reader.connections if c.topic == topic]
            want = [t for _, t, _ in reader.messages(connections=conns)]
            np.testing.assert_array_equal(got[topic], np.asarray(want, dtype=np.int64))
    finally:
        reader.close()


def test_ros1_record_slicer_declines_a_connection_record_at_an_index_entry():
    """A record other than message data at an index offset (rosbags skips connection records
    there): the bulk slicer declines (the window is then read through rosbags' loop). Records
    as the ROS bag format 2.0 lays them out: header length, fields, data length, data."""
    from goalkit.logs.bagindex import _ros1_records

    def rec(fields, data):
        head = b"".join(len(f).to_bytes(4, "little") + f for f in fields)
        return len(head).to_bytes(4, "little") + head + len(data).to_bytes(4, "little") + data

    msg = rec([b"op=\x02", b"conn=\x00\x00\x00\x00", b"time=" + bytes(8)], b"abc")
    conn = rec([b"topic=/x", b"op=\x07", b"conn=\x00\x00\x00\x00"], b"type=y")
    chunk = msg + conn + msg
    starts, ends = _ros1_records(chunk, np.array([0, len(msg) + len(conn)]))
    assert [chunk[a:b] for a, b in zip(starts, ends)] == [b"abc", b"abc"]
    assert _ros1_records(chunk, np.array([0, len(msg)])) is None
    with pytest.raises(ValueError):
        _ros1_records(chunk, np.array([len(chunk) - 2]))


def _varying_joint_messages(ts, n, ros1):
    """JointState messages whose frame id and joint names change length from message to message
    (several layouts, some of equal total length), positions in radians (REP 103)."""
    T = ts.types
    fids = ["arm", "arm_base", "arm_base", "tool0"]
    names = [["a", "b"], ["carriage", "boom"], ["c", "d"], ["carriage", "b"]]
    out = []
    for i in range(n):
        k = (i * 7 + i // 3) % 4
        stamp = T["builtin_interfaces/msg/Time"](sec=100 + i // 50, nanosec=(i % 50) * 20_000_000)
        h = T["std_msgs/msg/Header"](**({"seq": i} if ros1 else {}), stamp=stamp, frame_id=fids[k])
        out.append(T["sensor_msgs/msg/JointState"](header=h, name=names[k],
                                                   position=np.array([np.sin(0.01 * i), 0.1 * k]),
                                                   velocity=np.zeros(2), effort=np.zeros(0)))
    return out


@pytest.mark.parametrize("ros1", [False, True])
def test_fixed_layout_values_over_several_layouts_equal_rosbags(ros1):
    from rosbags.typesys import Stores, get_typestore

    import goalkit.logs.bagfast as fast
    from goalkit.logs.bagfile import Ref, resolve

    ts = get_typestore(Stores.ROS1_NOETIC if ros1 else Stores.ROS2_HUMBLE)
    name = "sensor_msgs/msg/JointState"
    ser = ts.serialize_ros1 if ros1 else ts.serialize_cdr
    de = ts.deserialize_ros1 if ros1 else ts.deserialize_cdr
    raws = [bytes(ser(m, name)) for m in _varying_joint_messages(ts, 400, ros1)]
    assert len({len(r) for r in raws}) >= 2
    ref = Ref("x", "/j:position", "/j", "position")
    proto = de(raws[0], name)
    resolve(ref, proto, name, "f")
    assert fast.fixed_layout_values(raws, proto, [ref], ts, ros1=ros1, header=True) is None
    got = fast.fixed_layout_values(raws, proto, [ref], ts, ros1=ros1, header=True,
                                   decode=lambda i: de(raws[i], name))
    want = np.stack([de(r, name).position for r in raws])
    np.testing.assert_array_equal(got[ref.text], want)
    # more layouts than allowed, or a width that changes: left to the per-message path
    assert fast.fixed_layout_values(raws, proto, [ref], ts, ros1=ros1, header=True,
                                    decode=lambda i: de(raws[i], name), max_layouts=2) is None
    T = ts.types
    wide = T["sensor_msgs/msg/JointState"](header=proto.header, name=["a", "b", "c"],
                                           position=np.array([1.0, 2.0, 3.0]), velocity=np.zeros(3),
                                           effort=np.zeros(0))
    mixed = raws[:5] + [bytes(ser(wide, name))]
    assert fast.fixed_layout_values(mixed, proto, [ref], ts, ros1=ros1, header=True,
                                    decode=lambda i: de(mixed[i], name)) is None


@pytest.mark.parametrize("kind", ["mcap", "sqlite", "ros1"])
def test_varying_layouts_read_equal_to_per_message_decoding(tmp_path, monkeypatch, kind):
    """A recording written with rosbags' writers whose joint names and frame ids vary: read
    with the several-layout path and with every message through rosbags' deserialiser."""
    from rosbags.rosbag1 import Writer as Writer1
    from rosbags.rosbag2 import StoragePlugin, Writer as Writer2
    from rosbags.typesys import Stores, get_typestore

    import goalkit.logs.bagfast as fast

    ros1 = kind == "ros1"
    ts = get_typestore(Stores.ROS1_NOETIC if ros1 else Stores.ROS2_HUMBLE)
    ser = ts.serialize_ros1 if ros1 else ts.serialize_cdr
    path = tmp_path / ("v.bag" if ros1 else "v")
    w = Writer1(path) if ros1 else Writer2(path, version=9, storage_plugin=(
        StoragePlugin.MCAP if kind == "mcap" else StoragePlugin.SQLITE3))
    T = ts.types
    lay = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
    with w:
        cj = w.add_connection("/j", "sensor_msgs/msg/JointState", typestore=ts)
        cc = w.add_connection("/c", "std_msgs/msg/Float64MultiArray", typestore=ts)
        for i, m in enumerate(_varying_joint_messages(ts, 600, ros1)):
            t = m.header.stamp.sec * 10**9 + m.header.stamp.nanosec
            w.write(cj, t, bytes(ser(m, "sensor_msgs/msg/JointState")))
            if i % 3 == 1:
                c = T["std_msgs/msg/Float64MultiArray"](layout=lay, data=np.array([0.5 * i, -1.0]))
                w.write(cc, t + 1000, bytes(ser(c, "std_msgs/msg/Float64MultiArray")))
    lay_ = {"shape": "bag", "keys": {"action": "/c:data"}, "fields": {"joints": "/j:position"},
            "bag": {"step_topic": "/c", "align": {"/j": "interpolate", "/c": "latest"}}}
    quick = open_logs(path, lay_).read(0, 1)
    monkeypatch.setattr(fast, "ENABLED", False)
    slow = open_logs(path, lay_).read(0, 1)
    assert quick.observations.shape[0] > 100
    np.testing.assert_array_equal(quick.observations, slow.observations)
    np.testing.assert_array_equal(quick.actions, slow.actions)


def test_two_fields_of_one_topic_read_message_by_message(tmp_path, monkeypatch):
    """Two fields from one topic (positions and velocities of the joint states) through the
    per-message path: each column equals the one-field read and rosbags' values (velocities
    are written as zeros in bag_testdata)."""
    import goalkit.logs.bagfast as fast

    monkeypatch.setattr(fast, "ENABLED", False)
    bag = _bag(tmp_path, "mcap", seed=15)
    two = {**LAYOUT, "fields": {"joints": f"{JOINTS}:position", "speeds": f"{JOINTS}:velocity",
                                "nozzle": f"{TIP}:pose.position"},
           "bag": {**LAYOUT["bag"], "align": {JOINTS: "nearest", TIP: "nearest", CMD: "latest"}}}
    one = {**two, "fields": {"joints": f"{JOINTS}:position", "nozzle": f"{TIP}:pose.position"}}
    a = open_logs(bag, two).read(0, 1)
    b = open_logs(bag, one).read(0, 1)
    np.testing.assert_array_equal(a.observations[:, :2], b.observations[:, :2])
    np.testing.assert_array_equal(a.observations[:, 2:4], 0.0)
    np.testing.assert_array_equal(a.observations[:, 4:], b.observations[:, 2:])
    assert np.ptp(a.observations[:, 0]) > 0.1


def test_decode_all_picks_values_as_rosbags_gives_them(tmp_path):
    from operator import attrgetter

    bag = _bag(tmp_path, "ros1", seed=16)
    reader = open_reader(Path(bag))
    try:
        conns = [c for c in reader.connections if c.topic == TIP]
        raws = [bytes(raw) for _, _, raw in reader.messages(connections=conns)]
        pick = attrgetter("pose.position.x", "pose.position.z")
        got = decode_all(raws, reader.typestore, conns[0].msgtype, ros1=True, pick=pick)
        want = [pick(reader.typestore.deserialize_ros1(r, conns[0].msgtype)) for r in raws]
        assert got == want and len(got) > 10
    finally:
        reader.close()
