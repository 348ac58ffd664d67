"""List the topics of bags (types, counts, rates, time ranges, gaps) and propose a layout
from the standard message types found."""

from __future__ import annotations

import numpy as np

from goalkit.errors import LayoutError
from goalkit.logs import bagros1
from goalkit.logs.bagfile import bag_files, find_bags, open_reader
from goalkit.logs.bagindex import record_times
from goalkit.logs.layout import parse_layout
from goalkit.logs.texttable import text_table

#: A gap is listed when it is longer than this many median periods of its topic.
GAP_FACTOR = 5.0


def list_topics(path) -> dict:
    """Topics of every bag at ``path`` with type, count, rate, time range and gaps.

    Reads every message's time (no decoding).

    Returns
    -------
    dict
        ``bags`` (list of paths) and ``topics``: per topic ``topic``, ``type``, ``count``,
        ``rate_hz`` (messages per second over its span), ``first_s``/``last_s`` (seconds after
        the first message of its bag, first bag), ``longest_gap_s`` and ``gaps`` (how many
        intervals exceed ``GAP_FACTOR`` median periods), summed over bags.
    """
    bags = find_bags(path)
    acc = {}
    for bag in bags:
        reader = open_reader(bag)
        try:
            t0 = reader.start_time
            cid = {c.id: c for c in reader.connections}
            times = record_times(reader, {c.topic for c in reader.connections})   # from the indexes
            if times is None:
                times = {}
                try:
                    for conn, t, _ in reader.messages():
                        times.setdefault(cid[conn.id].topic, []).append(t)
                except bagros1.BadBag as exc:
                    raise bagros1.as_log_error(exc, bag) from None
            for c in reader.connections:
                times.setdefault(c.topic, [])
                a = acc.setdefault(c.topic, {"topic": c.topic, "type": c.msgtype, "count": 0,
                                             "span_s": 0.0, "first_s": None, "last_s": None,
                                             "longest_gap_s": 0.0, "gaps": 0})
            for topic, ts in times.items():
                t = np.asarray(ts, dtype=np.int64)
                a = acc[topic]
                a["count"] += int(t.size)
                if t.size:
                    if a["first_s"] is None:
                        a["first_s"] = (int(t[0]) - t0) / 1e9
                    a["last_s"] = (int(t[-1]) - t0) / 1e9
                    a["span_s"] += (int(t[-1]) - int(t[0])) / 1e9
                if t.size > 2:
                    d = np.diff(t) / 1e9
                    a["longest_gap_s"] = max(a["longest_gap_s"], float(d.max()))
                    a["gaps"] += int((d > GAP_FACTOR * np.median(d)).sum())
        finally:
            reader.close()
    topics = []
    for a in sorted(acc.values(), key=lambda x: x["topic"]):
        a["rate_hz"] = (a["count"] - len(bags)) / a["span_s"] if a["span_s"] > 0 else 0.0
        del a["span_s"]
        topics.append(a)
    return {"bags": [str(b) for b in bags], "files": [f for b in bags for f in bag_files(b)],
            "topics": topics}


def _name(topic: str, taken) -> str:
    base = "".join(ch if ch.isalnum() else "_" for ch in topic.strip("/").split("/")[-1]) or "topic"
    name, i = base, 2
    while name in taken:
        name, i = f"{base}_{i}", i + 1
    return name


#: Standard message types -> (role, field path, alignment). "field" roles become [fields].
GUESSES = {
    "sensor_msgs/msg/JointState": ("field", "position", "interpolate"),
    "geometry_msgs/msg/PoseStamped": ("field", "pose.position", "interpolate"),
    "geometry_msgs/msg/PointStamped": ("field", "point", "interpolate"),
    "geometry_msgs/msg/Pose": ("field", "position", "interpolate"),
    "std_msgs/msg/Float64MultiArray": ("action", "data", "latest"),
    "std_msgs/msg/Float32MultiArray": ("action", "data", "latest"),
    "sensor_msgs/msg/Image": ("frame", "", "latest"),
    "sensor_msgs/msg/CompressedImage": ("frame", "", "latest"),
}


def propose_bag_layout(listing: dict):
    """A layout guessed from the topics' standard message types (see :data:`GUESSES`).

    Joint states and poses become observation fields (interpolated), a multi-array topic the
    action (its messages define the steps), an image topic the camera frames, a Bool topic
    whose name mentions "record" the episode marker, one mentioning "success" the success flag.
    Several bags: one episode per bag.

    Raises
    ------
    LayoutError
        When no command topic (a std_msgs Float64/Float32 multi-array) or no joint-state or pose
        topic is found.
    """
    fields, keys, align = {}, {}, {}
    bag = {}
    actions = []
    for t in listing["topics"]:
        if t["count"] == 0:
            continue
        g = GUESSES.get(t["type"])
        name = t["topic"].lower()
        if g is not None:
            role, path, rule = g
            if role == "field":
                fields[_name(t["topic"], fields)] = f"{t['topic']}:{path}"
                align[t["topic"]] = rule
            elif role == "action":
                actions.append(t)
            elif role == "frame" and "frame" not in keys:
                keys["frame"] = t["topic"]
                align[t["topic"]] = rule
        elif t["type"] == "std_msgs/msg/Bool":
            if "record" in name and "marker_topic" not in bag:
                bag.update(episodes="marker", marker_topic=t["topic"])
            elif "success" in name:
                keys["success"] = f"{t['topic']}:data"
    if not actions:
        raise LayoutError("no command topic found (std_msgs/msg/Float64MultiArray or "
                          "Float32MultiArray); write [keys] action = \"TOPIC:FIELD\" by hand")
    if not fields:
        raise LayoutError("no joint-state or pose topic found for observations; write [fields] "
                          "by hand")
    act = sorted(actions, key=lambda t: (not any(w in t["topic"].lower() for w in ("cmd", "command", "action")),
                                         t["topic"]))[0]
    keys["action"] = f"{act['topic']}:data"
    align[act["topic"]] = "latest"
    bag = {"step_topic": act["topic"], **bag, "align": align}
    if len(listing["bags"]) > 1:
        bag["episodes"] = "per-bag"
        bag.pop("marker_topic", None)
    return parse_layout({"shape": "bag", "keys": keys, "fields": fields, "bag": bag}, "<proposed>")


def render_topics(listing: dict) -> list[str]:
    """The human-readable topic table."""
    rows = [(t["topic"], t["type"], t["count"], f"{t['rate_hz']:.1f}",
             "-" if t["first_s"] is None else f"{t['first_s']:.3f} .. {t['last_s']:.3f}",
             f"{t['longest_gap_s']:.3f}", t["gaps"]) for t in listing["topics"]]
    out = [f"bags:         {len(listing['bags'])}", "", "topics:"]
    return out + text_table(("topic", "type", "messages", "rate Hz", "time s", "longest gap s",
                             f"gaps > {GAP_FACTOR:g}x period"), rows) + [""]
