"""goalkit's own ROS 1 index reading (goalkit.logs.bagros1) yields what rosbags' own ROS 1 reader
yields for bags written by rosbags' own ROS 1 writer: the same connections, the same messages
(topic, connection, record time, raw bytes, decoded fields) in the same order, with and without
chunk compression (bz2, lz4), and the same built arrays as reading through rosbags' reader.

The reference is rosbags' ``AnyReader`` (``messages`` and ``deserialize``) opened directly. Bad
bags (truncated, an unknown record op, a chunk longer than the file, a damaged message record)
stop with one line naming the file and the byte offset or the topic and time. The record layout
patched below is the ROS bag format version 2.0 (ROS wiki, "Bags/Format/2.0"; from memory):
uint32 header length, header fields (uint32 length, ``name=value``), uint32 data length, data.
"""

import json
import struct
import tracemalloc
from pathlib import Path

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from bag_testdata import CAM, CMD, JOINTS, LAYOUT, TIP, make_truth, write_bag
from goalkit.errors import LogError
from goalkit.logs import bagindex, bagros1, open_logs

rosbags = pytest.importorskip("rosbags")
from rosbags.highlevel import AnyReader  # noqa: E402
from rosbags.rosbag1 import Reader as Reader1, Writer as Writer1  # noqa: E402
from rosbags.typesys import Stores, get_typestore  # noqa: E402


def _rosbags(path):
    r = AnyReader([Path(path)], default_typestore=get_typestore(Stores.LATEST))
    r.open()
    return r


def _same(a, b):
    """Two decoded messages hold the same values (field by field, arrays by value and dtype)."""
    assert type(a).__name__ == type(b).__name__
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


def _shuffled_ros1(path, compression=None, n=2400, seed=4):
    """A ROS 1 bag of many small chunks whose messages were written out of time order with
    repeated times (chunks overlap in time; ties inside and across chunks and connections), and
    a topic carried by two connections (two caller ids)."""
    ts = get_typestore(Stores.ROS1_NOETIC)
    T = ts.types
    rng = np.random.default_rng(seed)
    times = 5_000_000_000 + rng.integers(0, 600, n) * 1_000_000
    w = Writer1(path)
    if compression:
        w.set_compression(getattr(Writer1.CompressionFormat, compression.upper()))
    w.chunk_threshold = 6000
    with w:
        a1 = w.add_connection("/bench/valve", "std_msgs/msg/Float64MultiArray", typestore=ts, callerid="/left")
        a2 = w.add_connection("/bench/valve", "std_msgs/msg/Float64MultiArray", typestore=ts, callerid="/right")
        b = w.add_connection("/bench/note", "std_msgs/msg/String", typestore=ts)
        lay = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
        for i, t in enumerate(times.tolist()):
            if i % 3:
                m = T["std_msgs/msg/Float64MultiArray"](layout=lay, data=np.full(1 + i % 5, float(i)))
                w.write(a1 if i % 4 else a2, t, ts.serialize_ros1(m, "std_msgs/msg/Float64MultiArray"))
            else:
                m = T["std_msgs/msg/String"](data="tray " * (i % 7))
                w.write(b, t, ts.serialize_ros1(m, "std_msgs/msg/String"))
    return path


def _listing(reader, conns=(), start=None, stop=None):
    return [(c.id, c.topic, t, bytes(raw)) for c, t, raw in reader.messages(connections=conns, start=start, stop=stop)]


@pytest.mark.parametrize("compression", [None, "bz2", "lz4"])
def test_messages_equal_rosbags_reader(tmp_path, compression):
    bag = _shuffled_ros1(tmp_path / "rec.bag", compression)
    ref, ours = _rosbags(bag), bagros1.open_bag(bag, get_typestore(Stores.LATEST))
    try:
        assert len(ours.chunks) >= 8
        assert {ch[3] for ch in ours.chunks} == {compression or "none"}
        # several chunks overlap in time (written out of order): groups of chunks are merged
        lows = sorted((ch[5], ch[6]) for ch in ours.chunks)
        assert any(b[0] <= a[1] for a, b in zip(lows, lows[1:]))
        key = lambda c: (c.id, c.topic, c.msgtype, c.digest, c.msgcount, c.msgdef, c.ext)
        assert [key(c) for c in ours.connections] == [key(c) for c in ref.connections]
        assert {k: (v.msgtype, v.msgcount) for k, v in ours.topics.items()} == \
            {k: (v.msgtype, v.msgcount) for k, v in ref.topics.items()}
        assert ours.start_time == ref.start_time
        want = _listing(ref)
        assert len(want) == 2400 and _listing(ours) == want
        # a subset of connections (in a different order) and a time range
        oc = [ours.connections[1], ours.connections[0]]
        rc = [ref.connections[1], ref.connections[0]]
        lo, hi = 5_150_000_000, 5_400_000_000
        assert _listing(ours, oc, lo, hi) == _listing(ref, rc, lo, hi)
        assert len(_listing(ours, oc, lo, hi)) > 300
        # record times from the index, and windows of raw messages
        times = ours.record_times(["/bench/valve", "/bench/note"])
        for topic in ("/bench/valve", "/bench/note"):
            np.testing.assert_array_equal(times[topic], [t for _, tp, t, _ in want if tp == topic])
        win = bagindex.window_reader(ours, ["/bench/valve", "/bench/note"])
        for a, b in [(lo, hi), (5_000_000_000, 5_000_000_000), (5_590_000_000, 9_000_000_000)]:
            got = win.window(a, b)
            loop = _listing(ref, ref.connections, a, b + 1)
            for topic in ("/bench/valve", "/bench/note"):
                assert got[topic][0].tolist() == [t for _, tp, t, _ in loop if tp == topic]
                assert [bytes(r) for r in got[topic][1]] == [r for _, tp, _, r in loop if tp == topic]
        # decoded fields: our typestore (built from the bag's definitions) and rosbags' agree
        types = {c.id: c.msgtype for c in ref.connections}
        for cid, _, _, raw in want[::7]:
            _same(ours.deserialize(raw, types[cid]), ref.deserialize(raw, types[cid]))
    finally:
        ours.close()
        ref.close()


@pytest.mark.parametrize("compression", [None, "bz2", "lz4"])
def test_recording_reads_the_same_as_through_rosbags(tmp_path, monkeypatch, compression):
    """Every read column (fields, actions, frames) of a gantry recording cut into episodes is
    the same through goalkit's index reading as through rosbags' own reader."""
    truth = make_truth(seed=8, segments=((0.0, 1.5), (2.5, 4.0), (5.0, 6.0)), image=True)
    bag = write_bag(tmp_path / "rec.bag", truth, "ros1", delay_seed=3, compression=compression,
                    chunk_bytes=20_000)
    lay = {**LAYOUT, "keys": {**LAYOUT["keys"], "frame": CAM},
           "bag": {**LAYOUT["bag"], "episodes": "gap", "cut_gap": 0.5}}
    ours = open_logs(bag, lay)
    assert isinstance(ours._kept[1], bagros1.Ros1Bag)
    a = ours.read(0, ours.num_episodes)
    monkeypatch.setattr(bagros1, "ENABLED", False)
    ref = open_logs(bag, lay)
    assert type(ref._kept[1]).__name__ == "AnyReader"
    b = ref.read(0, ref.num_episodes)
    assert ours.num_episodes == ref.num_episodes == 3
    for st_a, st_b in zip(ours.windows, ref.windows):
        np.testing.assert_array_equal(st_a[1], st_b[1])
        assert st_a[2:] == st_b[2:]
    for name in ("observations", "actions", "lengths", "frames"):
        x, y = getattr(a, name), getattr(b, name)
        assert x.dtype == y.dtype and x.shape == y.shape and x.size > 0
        np.testing.assert_array_equal(x, y)


def run(*args):
    from goalkit.cli import main

    return CliRunner().invoke(main, [str(a) for a in args])


def test_build_from_ros1_bags_identical_to_rosbags_path(tmp_path, monkeypatch):
    """scan -> proposed layout -> build of three ROS 1 takes gives the same datasets, byte for
    byte, through goalkit's index reading and through rosbags' own reader."""
    from goalkit.demo import make_demo

    folder = tmp_path / "takes"
    folder.mkdir()
    for i in range(4):
        write_bag(folder / f"take{i}.bag", make_truth(seed=20 + i, segments=((0.0, 1.0 + 0.3 * i),)), "ros1",
                  compression="bz2" if i % 2 else None, chunk_bytes=8000)
    res = run("scan", folder, "--write-layout", tmp_path / "layout.toml", "--json", "--quiet")
    assert res.exit_code == 0, res.output
    assert json.loads(res.output)["episodes"] == 4
    make_demo(tmp_path / "demo", episodes=4, seed=0)
    recipe = (tmp_path / "demo" / "gantry-recipe.toml").read_text()
    recipe = recipe.replace('path = "gantry-logs.h5"', f'path = "{folder}"')
    recipe = recipe.replace('layout = "gantry-layout.toml"', f'layout = "{tmp_path / "layout.toml"}"')
    recipe = recipe.replace('fields = ["head", "trays"]', 'fields = ["nozzle_pose"]')
    recipe = recipe.replace("original = 1", "original = 0").replace("validation = 0.1", "validation = 0.2")
    (tmp_path / "recipe.toml").write_text(recipe)
    res = run("build", tmp_path / "recipe.toml", "--quiet", "--out", tmp_path / "ours.h5")
    assert res.exit_code == 0, res.output
    monkeypatch.setattr(bagros1, "ENABLED", False)
    res = run("build", tmp_path / "recipe.toml", "--quiet", "--out", tmp_path / "ref.h5")
    assert res.exit_code == 0, res.output
    with h5py.File(tmp_path / "ours.h5") as f, h5py.File(tmp_path / "ref.h5") as g:
        names = []
        f.visit(lambda n: names.append(n) if isinstance(f[n], h5py.Dataset) and "provenance" not in n else None)
        assert len(names) > 5
        for n in names:
            x, y = f[n][()], g[n][()]
            assert x.dtype == y.dtype and np.shape(x) == np.shape(y), n
            if isinstance(x, np.ndarray):
                assert x.tobytes() == y.tobytes(), n
            else:
                assert x == y, n


# ---- bad bags ------------------------------------------------------------------------------

def _cli_scan(tmp_path, bag):
    from goalkit.logs.layout import layout_to_toml, parse_layout

    p = tmp_path / "lay.toml"
    p.write_text(layout_to_toml(parse_layout({**LAYOUT, "bag": {**LAYOUT["bag"], "episodes": "gap",
                                                                  "cut_gap": 0.5}})))
    return run("scan", bag, "--layout", p, "--quiet")


def _good(tmp_path, name="rec.bag", **kw):
    truth = make_truth(seed=3, segments=((0.0, 1.0), (2.0, 3.0)))
    return write_bag(tmp_path / name, truth, "ros1", chunk_bytes=6000, **kw)


def _one_line(res, *parts):
    out = res.output.strip()
    assert res.exit_code == 2 and len(out.splitlines()) == 1, res.output
    for p in parts:
        assert p in out, out
    assert "Traceback" not in out


def test_truncated_bag(tmp_path):
    bag = _good(tmp_path)
    data = bag.read_bytes()
    cut = tmp_path / "cut.bag"
    cut.write_bytes(data[:len(data) * 2 // 3])
    (index_pos,) = struct.unpack_from("<Q", data, data.index(b"index_pos=") + 10)
    _one_line(_cli_scan(tmp_path, cut), str(cut), f"bag header gives index_pos {index_pos}; the file "
              f"ends at byte {len(data) * 2 // 3} (truncated bag?)")


def test_unknown_record_op(tmp_path):
    bag = _good(tmp_path)
    data = bytearray(bag.read_bytes())
    with Reader1(bag) as r:
        index_pos = r.chunk_infos and struct.unpack_from("<Q", data, data.index(b"index_pos=") + 10)[0]
    at = data.index(b"op=\x06", index_pos)             # the first chunk info record
    data[at + 3] = 0x09
    bad = tmp_path / "op.bag"
    bad.write_bytes(bytes(data))
    _one_line(_cli_scan(tmp_path, bad), str(bad), "has op 0x09; expected a chunk info record (op 0x06)")


def test_chunk_longer_than_the_file(tmp_path):
    bag = _good(tmp_path)
    data = bytearray(bag.read_bytes())
    with Reader1(bag) as r:
        pos = r.chunk_infos[1].pos
    (hlen,) = struct.unpack_from("<I", data, pos)
    struct.pack_into("<I", data, pos + 4 + hlen, 0x7FFFFFF0)       # the chunk's data length
    bad = tmp_path / "long.bag"
    bad.write_bytes(bytes(data))
    _one_line(_cli_scan(tmp_path, bad), str(bad), f"chunk record at byte {pos} declares {0x7FFFFFF0} "
              f"bytes of data; the file ends at byte {len(data)} (truncated bag?)")


def test_damaged_message_record_names_topic_episode_and_time(tmp_path):
    bag = _good(tmp_path)
    data = bytearray(bag.read_bytes())
    with Reader1(bag) as r:
        conn = next(c for c in r.connections if c.topic == TIP)
        entry = r.indexes[conn.id][len(r.indexes[conn.id]) * 3 // 4]       # in the second episode
        at = r.chunks[entry.chunk_pos].datapos + entry.offset
        t0 = r.start_time
    op = data.index(b"op=\x02", at)
    assert op < at + 40
    data[op + 3] = 0x0B
    bad = tmp_path / "msg.bag"
    bad.write_bytes(bytes(data))
    _one_line(_cli_scan(tmp_path, bad), str(bad), f"key {TIP}: episode 1: expected a message data record "
              f"(op 0x02) at an index entry", f"t = {(entry.time - t0) / 1e9:.3f} s into the bag")


def test_lz4_chunks_without_the_lz4_package_are_refused(tmp_path, monkeypatch):
    bag = _good(tmp_path, compression="lz4")
    monkeypatch.setattr(bagros1, "_lz4", None)
    with pytest.raises(LogError, match=r"rec\.bag: chunk at byte \d+ is lz4-compressed; "
                                       r"reading it needs the lz4 package"):
        src = open_logs(bag, LAYOUT)
        src.read(0, 1)


def test_index_held_after_opening_does_not_grow_per_message(tmp_path):
    """rosbags' ROS 1 reader keeps an object per message after opening; goalkit keeps an entry
    per chunk. Measured with tracemalloc: bytes still allocated after opening a 10 s and a 60 s
    recording (after a first opening, which also fills rosbags' type caches), the difference per
    added message. Only the bytes allocated in each reader's own code are counted (the innermost
    frame in goalkit's or rosbags' files): building the message types on every opening makes the
    process-wide figure move by some 10 KB from one opening to the next, as much as the whole
    difference being measured."""
    store = get_typestore(Stores.LATEST)

    def held(opener, package):
        opener().close()
        tracemalloc.start()
        before = tracemalloc.take_snapshot()
        reader = opener()
        after = tracemalloc.take_snapshot()
        tracemalloc.stop()
        reader.close()
        own = [tracemalloc.Filter(True, f"*/{package}/*")]
        return sum(st.size_diff for st in after.filter_traces(own).compare_to(before.filter_traces(own), "filename"))

    got = {}
    for secs in (10.0, 60.0):
        truth = make_truth(seed=1, segments=((0.0, secs),), rates=(173.0, 61.0, 47.0))
        bag = write_bag(tmp_path / f"rec{secs:.0f}.bag", truth, "ros1")
        got[secs] = (sum(t.size for t, _ in truth.values()), held(lambda: bagros1.open_bag(bag, store), "goalkit"),
                     held(lambda: (rb := Reader1(bag), rb.open(), rb)[2], "rosbags"))
    (n1, ours1, theirs1), (n4, ours4, theirs4) = got[10.0], got[60.0]
    assert n4 - n1 > 12_000
    theirs = (theirs4 - theirs1) / (n4 - n1)
    ours = (ours4 - ours1) / (n4 - n1)
    assert theirs > 50, theirs            # an IndexData tuple per message
    print(f"bytes held per added message: goalkit {ours:.3f}, rosbags {theirs:.1f}")
    assert ours < 0.5, (ours, theirs)      # a few entries per chunk of about 1 MiB


def test_damaged_compressed_chunk(tmp_path):
    bag = _good(tmp_path, compression="bz2")
    data = bytearray(bag.read_bytes())
    with Reader1(bag) as r:
        ch = r.chunks[r.chunk_infos[1].pos]
        pos = r.chunk_infos[1].pos
    data[ch.datapos + ch.datasize // 2:ch.datapos + ch.datasize // 2 + 16] = bytes(16)
    bad = tmp_path / "bz.bag"
    bad.write_bytes(bytes(data))
    _one_line(_cli_scan(tmp_path, bad), str(bad), f"chunk at byte {pos} ")


def _property_bag(path, times, which, threshold, compression):
    ts = get_typestore(Stores.ROS1_NOETIC)
    T = ts.types
    w = Writer1(path)
    if compression:
        w.set_compression(getattr(Writer1.CompressionFormat, compression.upper()))
    w.chunk_threshold = threshold
    with w:
        conns = [w.add_connection("/bench/valve", "std_msgs/msg/Float64MultiArray", typestore=ts, callerid="/l"),
                 w.add_connection("/bench/valve", "std_msgs/msg/Float64MultiArray", typestore=ts, callerid="/r"),
                 w.add_connection("/bench/note", "std_msgs/msg/String", typestore=ts)]
        lay = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
        for i, (t, k) in enumerate(zip(times, which)):
            if k < 2:
                m = T["std_msgs/msg/Float64MultiArray"](layout=lay, data=np.full(i % 4, float(i)))
                w.write(conns[k], t, ts.serialize_ros1(m, "std_msgs/msg/Float64MultiArray"))
            else:
                w.write(conns[k], t, ts.serialize_ros1(T["std_msgs/msg/String"](data="x" * (i % 9)),
                                                       "std_msgs/msg/String"))


def test_order_and_windows_equal_rosbags_property(tmp_path):
    """Any write order, ties, chunk size and compression: the same messages in the same order as
    rosbags' reader, for the whole bag, a subset of connections in another order and a window."""
    hyp = pytest.importorskip("hypothesis")
    st = pytest.importorskip("hypothesis.strategies")
    counter = iter(range(10**6))

    @hyp.settings(max_examples=25, deadline=None, database=None)
    @hyp.given(data=st.data())
    def check(data):
        n = data.draw(st.integers(1, 250))
        times = data.draw(st.lists(st.integers(0, 40), min_size=n, max_size=n))
        which = data.draw(st.lists(st.integers(0, 2), min_size=n, max_size=n))
        threshold = data.draw(st.integers(100, 4000))
        compression = data.draw(st.sampled_from([None, "bz2", "lz4"]))
        lo, hi = sorted(data.draw(st.lists(st.integers(0, 41), min_size=2, max_size=2)))
        path = tmp_path / f"p{next(counter)}.bag"
        _property_bag(path, [1_000_000_000 + t * 1_000_000 for t in times], which, threshold, compression)
        ref, ours = _rosbags(path), bagros1.open_bag(path, get_typestore(Stores.LATEST))
        try:
            assert _listing(ours) == _listing(ref)
            a, b = 1_000_000_000 + lo * 1_000_000, 1_000_000_000 + hi * 1_000_000
            sub = [2, 0]
            assert _listing(ours, [ours.connections[i] for i in sub], a, b) == \
                _listing(ref, [ref.connections[i] for i in sub], a, b)
            topics = ["/bench/valve", "/bench/note"]
            got = ours.window(topics, a, b)
            loop = _listing(ref, ref.connections, a, b + 1)
            for topic in topics:
                assert got[topic][0].tolist() == [t for _, tp, t, _ in loop if tp == topic]
                assert [bytes(r) for r in got[topic][1]] == [r for _, tp, _, r in loop if tp == topic]
            times_got = ours.record_times(topics)
            every = _listing(ref)
            for topic in topics:
                assert times_got[topic].tolist() == [t for _, tp, t, _ in every if tp == topic]
        finally:
            ours.close()
            ref.close()

    check()


@pytest.mark.parametrize("compression", [None, "bz2"])
def test_damaged_bags_fail_as_one_line_or_read(tmp_path, compression):
    """Random damage (a cut, or a few bytes changed anywhere: headers, index, chunk data,
    message definitions): reading either succeeds or stops with goalkit's one-line error, never
    another exception. Seeded, 40 damaged copies."""
    import random

    from goalkit.errors import GoalkitError

    bag = _good(tmp_path, compression=compression)
    data = bag.read_bytes()
    lay = {**LAYOUT, "bag": {**LAYOUT["bag"], "episodes": "gap", "cut_gap": 0.5}}
    rng = random.Random(7)
    failed = 0
    for trial in range(40):
        b = bytearray(data)
        if trial % 3 == 0:
            b = b[:rng.randrange(len(b))]
        else:
            for _ in range(rng.randint(1, 4)):
                b[rng.randrange(len(b))] = rng.randrange(256)
        p = tmp_path / f"d{trial}.bag"
        p.write_bytes(bytes(b))
        try:
            src = open_logs(p, lay)
            src.read(0, src.num_episodes)
        except GoalkitError as exc:
            failed += 1
            assert "\n" not in str(exc) and str(exc).startswith(str(p)), str(exc)
    assert failed >= 13                      # every cut bag at least


def test_message_spans_step_over_connection_records():
    """An index entry that points at a connection record (op 0x07) is followed to the message
    data record after it, as rosbags' reader does; a record whose connection or time differs
    from its index entry, or of another op, is refused. Records as the ROS bag format 2.0 lays
    them out: header length, fields, data length, data."""
    def rec(fields, data):
        head = b"".join(len(f).to_bytes(4, "little") + f for f in fields)
        return len(head).to_bytes(4, "little") + head + len(data).to_bytes(4, "little") + data

    def msg(conn, sec, nsec, data):
        return rec([b"op=\x02", b"conn=" + struct.pack("<I", conn), b"time=" + struct.pack("<II", sec, nsec)], data)

    conn = rec([b"topic=/bench/valve", b"op=\x07", b"conn=\x01\x00\x00\x00"], b"type=std_msgs/Bool")
    a, b = msg(0, 5, 7, b"abc"), msg(1, 6, 0, b"tray")
    chunk = a + conn + conn + b
    offs = np.array([0, len(a), len(a) + len(conn)])
    starts, ends = bagros1.message_spans(chunk, offs, np.array([0, 1, 1]),
                                         np.array([5_000_000_007, 6_000_000_000, 6_000_000_000]))
    assert [chunk[s:e] for s, e in zip(starts, ends)] == [b"abc", b"tray", b"tray"]
    with pytest.raises(bagros1.BadBag, match="disagrees with its index entry") as err:
        bagros1.message_spans(chunk, offs[:2], np.array([0, 2]), np.array([5_000_000_007, 6_000_000_000]))
    assert err.value.entry == 1
    bad = a + rec([b"op=\x09"], b"")
    with pytest.raises(bagros1.BadBag, match=r"expected a message data record \(op 0x02\)"):
        bagros1.message_spans(bad, np.array([len(a)]), np.array([0]), np.array([0]))
    with pytest.raises(bagros1.BadBag, match="outside its chunk"):
        bagros1.message_spans(chunk, np.array([len(chunk) - 2]), np.array([0]), np.array([0]))
