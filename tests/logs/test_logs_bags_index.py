"""Message times and raw messages read through a bag's indexes equal what rosbags' own message
loop (AnyReader.messages) yields for the same bag: same times, same order, same bytes."""

from pathlib import Path

import numpy as np
import pytest

from bag_testdata import CMD, JOINTS, LAYOUT, TIP, make_truth, write_bag
from goalkit.logs import bagindex, open_logs
from goalkit.logs.bagfile import open_reader

rosbags = pytest.importorskip("rosbags")


def _loop(reader, topics, lo=None, hi=None):
    """Times and raw bytes per topic from rosbags' message loop."""
    conns = [c for c in reader.connections if c.topic in topics]
    out = {t: ([], []) for t in topics}
    kw = {} if lo is None else {"start": lo, "stop": hi + 1}
    for c, t, raw in reader.messages(connections=conns, **kw):
        out[c.topic][0].append(t)
        out[c.topic][1].append(bytes(raw))
    return out


def _shuffled_mcap(path, n=9000, seed=3, mode=None):
    """An MCAP bag of several 1 MiB chunks whose messages were written out of time order and
    with repeated times (chunks overlap in time; ties inside and across chunks)."""
    from rosbags.rosbag2 import StoragePlugin, Writer
    from rosbags.rosbag2.enums import CompressionFormat, CompressionMode
    from rosbags.typesys import Stores, get_typestore

    ts = get_typestore(Stores.ROS2_HUMBLE)
    T = ts.types
    rng = np.random.default_rng(seed)
    times = 1_000_000_000 + rng.integers(0, 2000, n) * 1_000_000     # many equal times
    w = Writer(path, version=9, storage_plugin=StoragePlugin.MCAP)
    if mode is not None:
        w.set_compression(getattr(CompressionMode, mode), CompressionFormat.ZSTD)
    with w:
        a = w.add_connection("/a", "std_msgs/msg/Float64MultiArray", typestore=ts)
        b = w.add_connection("/b", "std_msgs/msg/String", typestore=ts)
        lay = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
        for i, t in enumerate(times.tolist()):
            if i % 3:
                m = T["std_msgs/msg/Float64MultiArray"](layout=lay, data=np.full(100, float(i)))
                w.write(a, t, ts.serialize_cdr(m, "std_msgs/msg/Float64MultiArray"))
            else:
                m = T["std_msgs/msg/String"](data="x" * (i % 17))
                w.write(b, t, ts.serialize_cdr(m, "std_msgs/msg/String"))
    return path


@pytest.mark.parametrize("kind", ["mcap", "sqlite", "ros1"])
def test_record_times_equal_the_message_loop(tmp_path, kind):
    bag = write_bag(tmp_path / ("rec.bag" if kind == "ros1" else "rec"),
                    make_truth(seed=5, segments=((0.0, 2.0), (3.0, 5.0))), kind, delay_seed=9)
    topics = [JOINTS, TIP, CMD]
    reader = open_reader(Path(bag))
    try:
        got = bagindex.record_times(reader, topics)
        want = _loop(reader, topics)
    finally:
        reader.close()
    assert got is not None
    for t in topics:
        assert got[t].dtype == np.int64 and got[t].size > 50
        np.testing.assert_array_equal(got[t], np.asarray(want[t][0], dtype=np.int64))


@pytest.mark.parametrize("mode", [None, "STORAGE", "MESSAGE"])
def test_mcap_windows_equal_the_message_loop_across_chunks(tmp_path, mode):
    bag = _shuffled_mcap(tmp_path / "many", mode=mode)
    reader = open_reader(bag)
    try:
        storage = reader.readers[0].storage.storages[0]
        # the case of interest: several chunks (compressed one by one, messages shrink to one)
        assert len(storage.chunks) >= (1 if mode == "MESSAGE" else 3)
        assert (storage.chunks[0].compression == "zstd") == (mode == "STORAGE")
        times = bagindex.record_times(reader, ["/a", "/b"])
        loop = _loop(reader, ["/a", "/b"])
        for t in ("/a", "/b"):
            np.testing.assert_array_equal(times[t], np.asarray(loop[t][0], dtype=np.int64))
        win = bagindex.WindowReader.make(reader, ["/a", "/b"])
        if mode == "MESSAGE":                # messages compressed one by one: rosbags' loop reads
            assert win is None
            return
        assert win is not None
        for lo, hi in [(1_000_000_000, 1_500_000_000), (1_500_000_001, 2_999_000_000),
                       (1_700_000_000, 1_700_000_000), (5_000_000_000, 6_000_000_000)]:
            got, want = win.window(lo, hi), _loop(reader, ["/a", "/b"], lo, hi)
            for t in ("/a", "/b"):
                np.testing.assert_array_equal(got[t][0], np.asarray(want[t][0], dtype=np.int64))
                assert [bytes(r) for r in got[t][1]] == want[t][1]
    finally:
        reader.close()


@pytest.mark.parametrize("kind", ["mcap", "sqlite", "ros1"])
def test_windows_equal_the_message_loop(tmp_path, kind):
    bag = write_bag(tmp_path / ("rec.bag" if kind == "ros1" else "rec"),
                    make_truth(seed=6, segments=((0.0, 2.0), (3.0, 5.0))), kind, delay_seed=2)
    topics = [JOINTS, TIP, CMD]
    reader = open_reader(Path(bag))
    try:
        win = bagindex.window_reader(reader, topics)
        assert type(win).__name__ == {"mcap": "WindowReader", "sqlite": "SqliteWindows",
                                      "ros1": "Ros1ChunkWindows"}[kind]
        t0 = reader.start_time
        # windows read in time order, then one going back (a later read of an earlier episode)
        for lo, hi in [(t0, t0 + 700_000_000), (t0 + 700_000_001, t0 + 3_500_000_000),
                       (t0 + 3_500_000_001, t0 + 9_000_000_000), (t0 + 100_000_000, t0 + 150_000_000)]:
            got, want = win.window(lo, hi), _loop(reader, topics, lo, hi)
            for t in topics:
                assert len(want[t][0]) > 0
                np.testing.assert_array_equal(got[t][0], np.asarray(want[t][0], dtype=np.int64))
                assert [bytes(r) for r in got[t][1]] == want[t][1]
    finally:
        reader.close()


@pytest.mark.parametrize("kind", ["mcap", "sqlite", "ros1"])
def test_reading_through_indexes_equals_reading_every_record(tmp_path, monkeypatch, kind):
    bag = write_bag(tmp_path / ("rec.bag" if kind == "ros1" else "rec"),
                    make_truth(seed=7, segments=((0.0, 2.0), (3.0, 5.0))), kind, delay_seed=4)
    lay = {**LAYOUT, "bag": {**LAYOUT["bag"], "episodes": "gap", "cut_gap": 0.5}}
    quick = open_logs(bag, lay)
    a = quick.read(0, quick.num_episodes)
    monkeypatch.setattr(bagindex, "ENABLED", False)
    slow = open_logs(bag, lay)
    b = slow.read(0, slow.num_episodes)
    assert quick.num_episodes == slow.num_episodes == 2
    np.testing.assert_array_equal(a.observations, b.observations)
    np.testing.assert_array_equal(a.actions, b.actions)
    np.testing.assert_array_equal(a.lengths, b.lengths)
