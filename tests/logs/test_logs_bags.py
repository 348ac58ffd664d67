"""Bags written with rosbags' own writers (ROS 2 MCAP, ROS 2 SQLite, ROS 1) read back aligned
exactly as an independent numpy alignment of the same messages says.

The independent alignment below does not use goalkit.logs.align: "latest" counts the messages at
or before each step with np.searchsorted, "nearest" takes the argmin of |t_msg - t_step| over a
full distance matrix, "interpolate" is numpy's own np.interp per column.
"""

import numpy as np
import pytest

from bag_testdata import CAM, CMD, JOINTS, LAYOUT, REC, T0, TIP, make_truth, write_bag
from goalkit.errors import LayoutError, LogError
from goalkit.logs import open_logs


def ref_latest(t, v, s):
    return v[np.searchsorted(t, s, side="right") - 1]


def ref_nearest(t, v, s):
    d = np.abs(s[:, None].astype(np.float64) - t[None, :].astype(np.float64))
    return v[np.argmin(d, axis=1)]           # argmin takes the first (earlier) on a tie


def ref_interp(t, v, s):
    x = (t - T0).astype(np.float64)
    return np.stack([np.interp((s - T0).astype(np.float64), x, v[:, j]) for j in range(v.shape[1])], axis=1)


REF = {"latest": ref_latest, "nearest": ref_nearest, "interpolate": ref_interp}


def expected(truth, rules, step_topic=CMD, period=None, window=None):
    """Step times and aligned columns computed from the truth alone."""
    sub = {}
    for topic, (t, v) in truth.items():
        if topic == REC:
            continue
        keep = np.ones(t.size, bool) if window is None else (t >= window[0]) & (t <= window[1])
        sub[topic] = (t[keep], v[keep])
    start = max(t[0] for t, _ in sub.values())
    interp = [tp for tp in sub if rules.get(tp) == "interpolate"]
    stop = min(sub[tp][0][-1] for tp in interp) if interp else (
        window[1] if window is not None else max(t[-1] for t, _ in sub.values()))
    if period is None:
        s = sub[step_topic][0]
        s = s[(s >= start) & (s <= stop)]
    else:
        p = int(round(period * 1e9))
        s = start + np.arange((stop - start) // p + 1) * p
    col = {tp: REF[rules.get(tp, "latest")](*sub[tp], s) for tp in (JOINTS, TIP)}
    obs = np.concatenate([col[JOINTS], col[TIP]], axis=1)
    act = REF[rules.get(CMD, "latest")](*sub[CMD], s[:-1])
    return s, obs, act, sub


def layout_with(rules, **bag):
    lay = {k: (dict(v) if isinstance(v, dict) else v) for k, v in LAYOUT.items()}
    lay["bag"] = {"step_topic": CMD, "align": dict(rules)} | bag
    if "step_period" in bag:
        del lay["bag"]["step_topic"]
    return lay


@pytest.mark.parametrize("kind", ["mcap", "sqlite", "ros1"])
@pytest.mark.parametrize("rules", [
    {JOINTS: "interpolate", TIP: "nearest", CMD: "latest"},
    {JOINTS: "latest", TIP: "interpolate", CMD: "nearest"},
    {JOINTS: "nearest", TIP: "latest", CMD: "latest"},
])
def test_aligned_arrays_equal_an_independent_alignment(tmp_path, kind, rules):
    truth = make_truth(seed=7)
    bag = write_bag(tmp_path / ("rec.bag" if kind == "ros1" else "rec"), truth, kind)
    src = open_logs(bag, layout_with(rules))
    s, obs, act, _ = expected(truth, rules)
    assert src.lengths.tolist() == [s.size - 1]
    es = src.read(0, 1)
    np.testing.assert_allclose(es.observations, obs, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(es.actions, act)
    assert src.fields == {"joints": (0, 2), "nozzle": (2, 5)}
    assert any(f.endswith("metadata.yaml") for f in src.files) == (kind != "ros1")


def test_step_period_that_divides_no_rate(tmp_path):
    truth = make_truth(seed=3)
    rules = {JOINTS: "interpolate", TIP: "interpolate", CMD: "latest"}
    bag = write_bag(tmp_path / "rec", truth, "mcap")
    src = open_logs(bag, layout_with(rules, step_period=0.0213))
    s, obs, act, _ = expected(truth, rules, period=0.0213)
    es = src.read(0, 1)
    assert es.num_transitions == s.size - 1 > 100
    np.testing.assert_allclose(es.observations, obs, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(es.actions, act)


def test_one_bag_per_episode(tmp_path):
    rules = LAYOUT["bag"]["align"]
    truths = [make_truth(seed=i, segments=((0.0, 1.0 + 0.5 * i),)) for i in range(3)]
    for i, tr in enumerate(truths):
        write_bag(tmp_path / "bags" / f"take{i + 1}", tr, "sqlite") if i == 0 else \
            write_bag(tmp_path / "bags" / f"take{i + 1}", tr, "mcap")
    (tmp_path / "bags").mkdir(exist_ok=True)
    src = open_logs(tmp_path / "bags", layout_with(rules))
    assert src.num_episodes == 3
    es = src.read(0, 3)
    for e, tr in enumerate(truths):
        s, obs, act, _ = expected(tr, rules)
        got = es.select(e, e + 1)
        np.testing.assert_allclose(got.observations, obs, atol=1e-12)
        np.testing.assert_array_equal(got.actions, act)


def test_episodes_cut_by_gaps(tmp_path):
    rules = {JOINTS: "interpolate", TIP: "nearest"}
    truth = make_truth(seed=5, segments=((0.0, 1.5), (3.5, 5.0), (6.2, 7.0)))
    bag = write_bag(tmp_path / "rec", truth, "mcap")
    src = open_logs(bag, layout_with(rules, episodes="gap", cut_gap=0.8))
    assert src.num_episodes == 3
    cmd_t = truth[CMD][0]
    for e, (a, b) in enumerate(((0.0, 1.5), (3.5, 5.0), (6.2, 7.0))):
        ct = cmd_t[(cmd_t >= T0 + a * 1e9) & (cmd_t <= T0 + b * 1e9)]
        s, obs, act, _ = expected(truth, rules, window=(ct[0], ct[-1]))
        es = src.read(e, e + 1)
        np.testing.assert_allclose(es.observations, obs, atol=1e-12)
        np.testing.assert_array_equal(es.actions, act)


def test_episodes_cut_by_a_bool_marker(tmp_path):
    rules = {JOINTS: "interpolate", TIP: "nearest"}
    marks = [(0.4, True), (1.7, False), (2.0, False), (2.3, True), (2.9, True), (3.6, False)]
    truth = make_truth(seed=9, segments=((0.0, 4.0),), marker=marks)
    bag = write_bag(tmp_path / "rec", truth, "ros1" if False else "mcap")
    src = open_logs(bag, layout_with(rules, episodes="marker", marker_topic=REC))
    assert src.num_episodes == 2
    for e, (a, b) in enumerate(((0.4, 1.7), (2.3, 3.6))):
        s, obs, act, _ = expected(truth, rules, window=(T0 + int(a * 1e9), T0 + int(b * 1e9) - 1))
        es = src.read(e, e + 1)
        np.testing.assert_allclose(es.observations, obs, atol=1e-12)
        np.testing.assert_array_equal(es.actions, act)


def test_camera_frames_follow_the_steps_and_are_resized(tmp_path):
    truth = make_truth(seed=2, image=True)
    bag = write_bag(tmp_path / "rec", truth, "mcap")
    lay = layout_with({JOINTS: "interpolate", TIP: "nearest", CAM: "latest"})
    lay["keys"]["frame"] = CAM
    es = open_logs(bag, lay).read(0, 1)
    s, *_ = expected(truth, {JOINTS: "interpolate", TIP: "nearest", CAM: "latest"})
    np.testing.assert_array_equal(es.frames, ref_latest(*truth[CAM], s))
    lay["bag"]["frame_size"] = [3, 4]
    small = open_logs(bag, lay).read(0, 1).frames
    assert small.shape == (s.size, 3, 4, 3) and small.dtype == np.uint8
    lay["bag"]["align"][CAM] = "interpolate"
    with pytest.raises(LayoutError, match="images are not interpolated"):
        open_logs(bag, lay)


def test_sidecar_outcomes(tmp_path):
    for i in range(2):
        write_bag(tmp_path / "bags" / f"take{i}", make_truth(seed=i, segments=((0, 1.0),)), "mcap")
    (tmp_path / "bags" / "outcomes.toml").write_text(
        "[[episode]]\ntask = 2\nsuccess = true\n\n[[episode]]\ntask = 0\nsuccess = false\n")
    lay = layout_with(LAYOUT["bag"]["align"], sidecar="outcomes.toml")
    lay["keys"].update(task="@sidecar", success="@sidecar")
    src = open_logs(tmp_path / "bags", lay)
    es = src.read(0, 2)
    assert es.task_ids.tolist() == [2, 0]
    assert es.success.sum() == 1 and es.success[es.offsets[1] - 1]
    assert str(tmp_path / "bags" / "outcomes.toml") in src.files


def test_header_clock_aligns_on_the_stamps_not_the_record_times(tmp_path):
    rules = {JOINTS: "interpolate", TIP: "nearest", CMD: "latest"}
    truth = make_truth(seed=11)
    # record times are the stamps plus a 0-4 ms transport delay; the command topic has no
    # header, so its record time is its time under either clock
    bag = write_bag(tmp_path / "rec", truth, "mcap", delay_seed=4)
    src = open_logs(bag, layout_with(rules, clock="header", step_period=0.02))
    st = src.windows[0][1]
    first = max(truth[JOINTS][0][0], truth[TIP][0][0])
    assert first <= st[0] <= first + 4_000_000 or st[0] <= truth[CMD][0][0] + 4_000_000
    assert st[-1] <= truth[JOINTS][0][-1] and (np.diff(st) == 20_000_000).all() and st.size > 100
    es = src.read(0, 1)
    np.testing.assert_allclose(es.observations[:, :2], ref_interp(*truth[JOINTS], st), atol=1e-12)
    np.testing.assert_allclose(es.observations[:, 2:], ref_nearest(*truth[TIP], st), atol=1e-12)
    # the record clock sees the delayed times: different joint values at its own steps
    es_rec = open_logs(bag, layout_with(rules, step_period=0.02)).read(0, 1)
    assert not np.allclose(es_rec.observations[:, :2], ref_interp(*truth[JOINTS], st[:es_rec.observations.shape[0]]),
                           atol=1e-9)


@pytest.mark.parametrize("case, pattern", [
    ("topic", r"rec: key /gantry/joint_state: no such topic; topics: .*closest: /gantry/joint_states"),
    ("field", r"key /gantry/nozzle_pose:pose.positon: no field 'positon' in geometry_msgs/msg/PoseStamped pose; fields: position, orientation \(closest: position\)"),
    ("string", r"key /gantry/joint_states:name: field 'name'"),
    ("interp_flag", r"holds flags; expected latest or nearest"),
])
def test_layout_mistakes_are_one_line(tmp_path, case, pattern):
    truth = make_truth(seed=1, marker=[(0.2, True)])
    bag = write_bag(tmp_path / "rec", truth, "mcap")
    lay = layout_with({JOINTS: "interpolate"})
    if case == "topic":
        lay["fields"]["joints"] = "/gantry/joint_state:position"
    elif case == "field":
        lay["fields"]["nozzle"] = f"{TIP}:pose.positon"
    elif case == "string":
        lay["fields"]["joints"] = f"{JOINTS}:name"
    else:
        lay["keys"]["success"] = f"{REC}:data"
        lay["bag"]["align"][REC] = "interpolate"
    with pytest.raises((LogError, LayoutError), match=pattern):
        open_logs(bag, lay)


def _cli_error(tmp_path, bag, lay, *extra):
    from click.testing import CliRunner

    from goalkit.cli import main
    from goalkit.logs.layout import layout_to_toml, parse_layout
    p = tmp_path / "lay.toml"
    p.write_text(layout_to_toml(parse_layout(lay)))
    res = CliRunner().invoke(main, ["scan", str(bag), "--layout", str(p), "--quiet", *extra])
    return res


def test_bad_recordings_are_one_line_exit_2(tmp_path):
    rules = {JOINTS: "interpolate", TIP: "nearest"}
    # time going backwards in the header stamps
    def back(topic, t):
        if topic == JOINTS:
            t[40], t[41] = t[41], t[40]
        return t
    bag = write_bag(tmp_path / "back", make_truth(seed=2), "mcap", header_edit=back)
    res = _cli_error(tmp_path, bag, layout_with(rules, clock="header"))
    assert res.exit_code == 2 and len(res.output.strip().splitlines()) == 1, res.output
    assert "key /gantry/joint_states: time goes backwards at t = " in res.output
    # a message that cannot be decoded
    bag = write_bag(tmp_path / "junk", make_truth(seed=2), "sqlite", garbage=TIP)
    res = _cli_error(tmp_path, bag, layout_with(rules))
    assert res.exit_code == 2 and "key /gantry/nozzle_pose: episode 0: cannot decode a " \
        "geometry_msgs/msg/PoseStamped message at t = " in res.output, res.output
    # a gap longer than allowed, then skipped with --skip-bad-episodes
    tr = make_truth(seed=2, segments=((0.0, 1.0), (3.0, 4.0), (6.0, 7.0)))
    t, v = tr[TIP]
    keep = ~((t > T0 + 3.2e9) & (t < T0 + 3.9e9))
    tr[TIP] = (t[keep], v[keep])
    bag = write_bag(tmp_path / "gap", tr, "mcap")
    lay = layout_with(rules, episodes="gap", cut_gap=1.5, max_gap=0.3)
    res = _cli_error(tmp_path, bag, lay)
    assert res.exit_code == 2 and "key /gantry/nozzle_pose: episode 1: gap of 0." in res.output, res.output
    assert "expected at most max_gap = 0.3 s" in res.output
    res = _cli_error(tmp_path, bag, lay, "--skip-bad-episodes", "--json")
    assert res.exit_code == 0, res.output
    import json
    rep = json.loads(res.output)
    assert rep["episodes"] == 2 and rep["skipped"][0]["episode"] == 1
    # a topic with no message in an episode
    tr = make_truth(seed=2, segments=((0.0, 1.0), (3.0, 4.0)))
    t, v = tr[TIP]
    tr[TIP] = (t[t < T0 + 2e9], v[t < T0 + 2e9])
    bag = write_bag(tmp_path / "none", tr, "mcap")
    res = _cli_error(tmp_path, bag, layout_with(rules, episodes="gap", cut_gap=1.5))
    assert res.exit_code == 2 and "key /gantry/nozzle_pose: episode 1: no message on this topic " \
        "in the episode (t = 3.0" in res.output, res.output


def test_unsupported_image_encoding(tmp_path):
    bag = write_bag(tmp_path / "rec", make_truth(seed=2, image=True), "mcap", encoding="bayer_rggb8")
    lay = layout_with({JOINTS: "interpolate", TIP: "nearest"})
    lay["keys"]["frame"] = CAM
    res = _cli_error(tmp_path, bag, lay)
    assert res.exit_code == 2 and len(res.output.strip().splitlines()) == 1
    assert "key /gantry/camera: episode 0: image encoding 'bayer_rggb8' at t = " in res.output
    assert "expected one of mono8, rgb8, bgr8" in res.output


def test_fixed_layout_path_equals_per_message_decoding(tmp_path, monkeypatch):
    """The whole-topic decoding gives what rosbags' per-message deserialisation gives; a topic
    whose messages change structure (frame ids of different lengths) falls back to it."""
    import goalkit.logs.bagfast as fast
    truth = make_truth(seed=21)
    rules = {JOINTS: "interpolate", TIP: "nearest"}
    for kind in ("mcap", "ros1"):
        bag = write_bag(tmp_path / (kind + (".bag" if kind == "ros1" else "")), truth, kind)
        quick = open_logs(bag, layout_with(rules)).read(0, 1)
        monkeypatch.setattr(fast, "ENABLED", False)
        slow = open_logs(bag, layout_with(rules)).read(0, 1)
        monkeypatch.setattr(fast, "ENABLED", True)
        np.testing.assert_array_equal(quick.observations, slow.observations)
        np.testing.assert_array_equal(quick.actions, slow.actions)
    # frame ids that change length move the fields: the check must refuse the fast path
    from rosbags.typesys import Stores, get_typestore
    ts = get_typestore(Stores.ROS2_HUMBLE)
    msgs = []
    # same total length, different structure: the joint name takes what the frame id gives up
    for i, (fid, name) in enumerate([("abc", "abcdefg"), ("abcdefg", "abc"), ("abc", "abcdefg")]):
        h = ts.types["std_msgs/msg/Header"](stamp=ts.types["builtin_interfaces/msg/Time"](sec=i, nanosec=0),
                                            frame_id=fid)
        m = ts.types["sensor_msgs/msg/JointState"](header=h, name=[name], position=np.array([0.5 + i]),
                                                   velocity=np.zeros(1), effort=np.zeros(1))
        msgs.append(ts.serialize_cdr(m, "sensor_msgs/msg/JointState").tobytes())
    from goalkit.logs.bagfile import Ref, resolve
    ref = Ref("x", f"{JOINTS}:position", JOINTS, "position")
    proto = ts.deserialize_cdr(msgs[0], "sensor_msgs/msg/JointState")
    resolve(ref, proto, "sensor_msgs/msg/JointState", "f")
    assert len({len(m) for m in msgs}) == 1
    assert fast.fixed_layout_values(msgs, proto, [ref], ts, ros1=False, header=True) is None
    same = [msgs[0]] * 2
    got = fast.fixed_layout_values(same, proto, [ref], ts, ros1=False, header=True)
    assert got[ref.text].tolist() == [[0.5], [0.5]]


def test_bags_that_disagree(tmp_path):
    """A topic whose type or width changes from one bag to the next is refused in one line."""
    write_bag(tmp_path / "bags" / "take1", make_truth(seed=1, segments=((0, 1.0),)), "mcap")
    tr = make_truth(seed=2, segments=((0, 1.0),))
    t, v = tr[JOINTS]
    tr[JOINTS] = (t, np.concatenate([v, v[:, :1]], axis=1))       # a third joint appears
    write_bag(tmp_path / "bags" / "take2", tr, "mcap")
    src = open_logs(tmp_path / "bags", layout_with({JOINTS: "interpolate"}))
    with pytest.raises(LogError, match=r"take2: key /gantry/joint_states:position: episode 1: has "
                                       r"values of width 3; expected 2 in every message"):
        src.read(0, 2)
    skipping = open_logs(tmp_path / "bags", layout_with({JOINTS: "interpolate"}), skip_bad_episodes=True)
    assert skipping.episode_ids.tolist() == [0] and skipping.skipped[0][0] == 1
    # a second bag whose pose topic carries another message type
    from rosbags.rosbag2 import StoragePlugin, Writer
    from rosbags.typesys import Stores, get_typestore
    write_bag(tmp_path / "mixed" / "a", make_truth(seed=3, segments=((0, 1.0),)), "mcap")
    ts = get_typestore(Stores.ROS2_HUMBLE)
    with Writer(tmp_path / "mixed" / "b", version=9, storage_plugin=StoragePlugin.MCAP) as w:
        for topic, ty in ((JOINTS, "sensor_msgs/msg/JointState"), (CMD, "std_msgs/msg/Float64MultiArray"),
                          (TIP, "std_msgs/msg/Bool")):
            w.add_connection(topic, ty, typestore=ts)
        w.write(w.connections[2], T0, ts.serialize_cdr(ts.types["std_msgs/msg/Bool"](data=True), "std_msgs/msg/Bool"))
    with pytest.raises(LogError, match=r"b: key /gantry/nozzle_pose: carries std_msgs/msg/Bool; "
                                       r"the first bag's carries geometry_msgs/msg/PoseStamped"):
        open_logs(tmp_path / "mixed", layout_with({JOINTS: "interpolate"}))


def test_compressed_images_are_decoded_with_pillow(tmp_path):
    """sensor_msgs/msg/CompressedImage with PNG data (lossless) reads back the original pixels."""
    import io

    from PIL import Image
    from rosbags.rosbag2 import StoragePlugin, Writer
    from rosbags.typesys import Stores, get_typestore

    truth = make_truth(seed=4, image=True)
    cam_t, cam_v = truth.pop(CAM)
    ts = get_typestore(Stores.ROS2_HUMBLE)
    T = ts.types
    bag2 = tmp_path / "rec"
    with Writer(bag2, version=8, storage_plugin=StoragePlugin.SQLITE3) as w:
        conns = {}
        from bag_testdata import TYPES, _messages
        events = []
        for topic, (t, v) in truth.items():
            conns[topic] = w.add_connection(topic, TYPES[topic], typestore=ts)
            events += [(int(x), topic, ts.serialize_cdr(m, TYPES[topic]))
                       for x, m in zip(t, _messages(ts, topic, t, v, False))]
        conns[CAM] = w.add_connection(CAM, "sensor_msgs/msg/CompressedImage", typestore=ts)
        for x, img in zip(cam_t, cam_v):
            buf = io.BytesIO()
            Image.fromarray(img).save(buf, format="PNG")
            h = T["std_msgs/msg/Header"](stamp=T["builtin_interfaces/msg/Time"](sec=int(x // 10**9), nanosec=int(x % 10**9)),
                                         frame_id="cam")
            m = T["sensor_msgs/msg/CompressedImage"](header=h, format="png",
                                                     data=np.frombuffer(buf.getvalue(), dtype=np.uint8))
            events.append((int(x), CAM, ts.serialize_cdr(m, "sensor_msgs/msg/CompressedImage")))
        for x, topic, raw in sorted(events, key=lambda e: e[0]):
            w.write(conns[topic], x, raw)
    lay = layout_with({JOINTS: "interpolate", TIP: "nearest", CAM: "nearest"})
    lay["keys"]["frame"] = CAM
    es = open_logs(bag2, lay).read(0, 1)
    truth[CAM] = (cam_t, cam_v)
    s, *_ = expected(truth, {JOINTS: "interpolate", TIP: "nearest", CAM: "nearest"})
    np.testing.assert_array_equal(es.frames, ref_nearest(cam_t, cam_v, s))


def test_header_clock_reads_ros1_and_cdr_stamps_alike(tmp_path):
    """The raw-byte stamp reader agrees on ROS 1 and CDR layouts: both bags read the same."""
    truth = make_truth(seed=12)
    rules = {JOINTS: "interpolate", TIP: "nearest"}
    lay = layout_with(rules, clock="header", step_period=0.025)
    got = [open_logs(write_bag(tmp_path / name, truth, kind), lay).read(0, 1)
           for name, kind in (("a.bag", "ros1"), ("b", "mcap"))]
    np.testing.assert_array_equal(got[0].observations, got[1].observations)
    st = open_logs(tmp_path / "a.bag", lay).windows[0][1]
    np.testing.assert_allclose(got[0].observations[:, :2], ref_interp(*truth[JOINTS], st), atol=1e-12)


def test_episodes_started_by_messages(tmp_path):
    marks = [(0.3, True), (1.4, True), (2.6, True)]
    truth = make_truth(seed=13, segments=((0.0, 3.5),), marker=marks)
    bag = write_bag(tmp_path / "rec", truth, "sqlite")
    rules = {JOINTS: "interpolate", TIP: "nearest"}
    src = open_logs(bag, layout_with(rules, episodes="start", marker_topic=REC))
    assert src.num_episodes == 3
    ends = [1.4, 2.6, None]
    for e, ((a, _), z) in enumerate(zip(marks, ends)):
        last = max(t[-1] for tp, (t, _) in truth.items() if tp != REC)
        window = (T0 + int(a * 1e9), T0 + int(z * 1e9) - 1 if z else last)
        s, obs, act, _ = expected(truth, rules, window=window)
        es = src.read(e, e + 1)
        np.testing.assert_allclose(es.observations, obs, atol=1e-12)
        np.testing.assert_array_equal(es.actions, act)


def test_success_flag_from_a_topic_is_the_outcome_of_each_step(tmp_path):
    """A Bool topic read as the success flag: transition t takes the latest value at step t + 1."""
    marks = [(0.0, False), (1.1, True), (1.9, False), (2.5, True)]
    truth = make_truth(seed=14, marker=marks)
    bag = write_bag(tmp_path / "rec.bag", truth, "ros1")
    rules = {JOINTS: "interpolate", TIP: "nearest"}
    lay = layout_with(rules)
    lay["keys"]["success"] = f"{REC}:data"
    es = open_logs(bag, lay).read(0, 1)
    sub = {tp: v for tp, v in truth.items() if tp != REC}
    s, *_ = expected(sub, rules)
    want = ref_latest(*truth[REC], s[1:])
    assert want.any() and not want.all()
    np.testing.assert_array_equal(es.success, want)
