"""Reading and aligning ROS bags against a plain rosbags read loop, and memory at two sizes.

    .venv/bin/python benchmarks/bench_bags.py                        # 250k and 1M messages
    .venv/bin/python benchmarks/bench_bags.py --sizes 100000,250000 --repeats 1

Recording (invented, irrigation-gantry arm): three topics in one ROS 2 MCAP bag written with
rosbags' own writer -- sensor_msgs/msg/JointState (6 joints, 500 Hz), geometry_msgs/msg/
PoseStamped (250 Hz) and std_msgs/msg/Float64MultiArray commands (250 Hz, the steps); 20 s
episodes separated by 3 s pauses, cut with ``episodes = "gap"``; joints interpolated, pose
nearest, command latest.

Floor: a plain loop over rosbags' AnyReader.messages() calling the typestore's
deserialize_cdr (deserialize_ros1 for ROS 1) on every message of the same bag (decode only,
nothing kept). ``--storage sqlite`` or ``ros1`` writes the same recording in that storage.
goalkit: open_logs (message times from the bag's indexes) and reading every episode in
chunks of 100k transitions (decode, field look-ups, alignment); also measured with the
whole-topic decoding switched off (every message through rosbags' generated deserialiser,
goalkit.logs.bagdecode), reported as per_message. A second recording (``vary``: joint names and
frame ids change length between messages) is one where the messages of the joint and pose
topics fall into several layouts (decoded layout by layout); it is measured against its own
floor, and once more with goalkit.logs.bagindex switched off (times and messages read through
rosbags' message loop, as before that module), reported as varying_no_index (``--no-varying``
skips that recording). With ``--storage ros1`` goalkit reads the bag through its own index
reading (goalkit.logs.bagros1) and is measured once more through rosbags' own ROS 1 reader,
which keeps the bag's whole index in memory (rosbags_index). Each run is a
fresh process; the median of --repeats runs is used, and ``ratios`` gives the median, min and
max of the per-repeat ratios (floor and goalkit run next to each other) by wall time and by
the process's CPU time (steadier on a shared machine); ``load_average`` is the machine's load
when each size finished. Peak RSS is each process's own (VmHWM), also taken right after
opening (open_peak_rss_mb: the message times held while planning episodes).

Targets: goalkit >= 0.8 x the floor's message rate on both recordings and with the whole-topic
decoding off; goalkit's peak RSS at the larger size
within 1.3 x of that at the smaller (memory bounded by a chunk of episodes plus the open
bag's message times). Results: benchmarks/results/bags.json (bags_sqlite.json,
bags_ros1.json for the other storages).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
RATES = {"/arm/joints": 500.0, "/arm/tip": 250.0, "/arm/cmd": 250.0}
EPISODE_S, PAUSE_S = 20.0, 3.0
T0 = 1_700_000_000 * 10**9

LAYOUT = {
    "shape": "bag",
    "keys": {"action": "/arm/cmd:data"},
    "fields": {"joints": "/arm/joints:position", "tip": "/arm/tip:pose.position"},
    "bag": {"step_topic": "/arm/cmd", "episodes": "gap", "cut_gap": 1.0,
            "align": {"/arm/joints": "interpolate", "/arm/tip": "nearest", "/arm/cmd": "latest"}},
}


def write_recording(path: Path, messages: int, seed: int = 0, vary: bool = False, storage: str = "mcap") -> int:
    """Write a bag of about ``messages`` messages; return the exact count.

    ``vary``: joint names and frame ids change length from message to message (as when a driver
    reports the joints it currently sees), so raw messages of a topic differ in length and
    goalkit's fixed-layout decoding cannot apply to the joint and pose topics. ``storage``:
    "mcap" or "sqlite" (ROS 2) or "ros1" (``path`` then gets a .bag suffix).
    """
    from rosbags.rosbag1 import Writer as Writer1
    from rosbags.rosbag2 import StoragePlugin, Writer
    from rosbags.typesys import Stores, get_typestore

    ros1 = storage == "ros1"
    ts = get_typestore(Stores.ROS1_NOETIC if ros1 else Stores.ROS2_HUMBLE)
    ser = ts.serialize_ros1 if ros1 else ts.serialize_cdr
    T = ts.types
    rng = np.random.default_rng(seed)
    per_s = sum(RATES.values())
    episodes = max(1, int(round(messages / (per_s * EPISODE_S))))
    events = []
    for e in range(episodes):
        a = T0 + int(e * (EPISODE_S + PAUSE_S) * 1e9)
        for topic, rate in RATES.items():
            n = int(EPISODE_S * rate)
            t = a + (np.arange(n) * (1e9 / rate) + rng.uniform(0, 0.2e9 / rate, n)).astype(np.int64)
            events += [(int(x), topic) for x in t]
    events.sort()
    stamp = T["builtin_interfaces/msg/Time"]
    header = T["std_msgs/msg/Header"]
    names = ["j%d" % i for i in range(6)]
    long_names = ["wrist_joint_%d" % i for i in range(6)]
    count = 0
    w = (Writer1(path) if ros1 else
         Writer(path, version=9, storage_plugin=StoragePlugin.MCAP if storage == "mcap" else StoragePlugin.SQLITE3))
    with w:
        types = {"/arm/joints": "sensor_msgs/msg/JointState", "/arm/tip": "geometry_msgs/msg/PoseStamped",
                 "/arm/cmd": "std_msgs/msg/Float64MultiArray"}
        conns = {tp: w.add_connection(tp, ty, typestore=ts) for tp, ty in types.items()}
        lay = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
        for t, topic in events:
            s = (t - T0) / 1e9
            odd = vary and count % 2 == 1
            count += 1
            h = header(**({"seq": count} if ros1 else {}), stamp=stamp(sec=t // 10**9, nanosec=t % 10**9),
                       frame_id="arm_base" if odd else "arm")
            if topic == "/arm/joints":
                m = T["sensor_msgs/msg/JointState"](header=h, name=long_names if odd else names, position=np.sin(s + np.arange(6.0)),
                                                    velocity=np.zeros(6), effort=np.zeros(6))
            elif topic == "/arm/tip":
                p = T["geometry_msgs/msg/Point"](x=np.sin(s), y=np.cos(s), z=0.1 * s)
                q = T["geometry_msgs/msg/Quaternion"](x=0.0, y=0.0, z=0.0, w=1.0)
                m = T["geometry_msgs/msg/PoseStamped"](header=h, pose=T["geometry_msgs/msg/Pose"](position=p, orientation=q))
            else:
                m = T["std_msgs/msg/Float64MultiArray"](layout=lay, data=np.array([np.sin(2 * s), np.cos(2 * s), s]))
            w.write(conns[topic], t, ser(m, types[topic]))
    return len(events)


# VmHWM is the peak RSS of this process image; ru_maxrss would include the parent's peak at
# fork (Linux keeps it across execve), which holds the written bag's events.
PEAK = """
def peak_mb():
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
"""

FLOOR = PEAK + """
import json, time
from pathlib import Path
from rosbags.highlevel import AnyReader
from rosbags.typesys import Stores, get_typestore
t, c0 = time.perf_counter(), time.process_time()
n = 0
with AnyReader([Path({bag!r})], default_typestore=get_typestore(Stores.LATEST)) as r:
    deser = r.typestore.deserialize_cdr if r.is2 else r.typestore.deserialize_ros1
    for c, _, raw in r.messages():
        deser(raw, c.msgtype)
        n += 1
print(json.dumps({{"seconds": time.perf_counter() - t, "cpu_seconds": time.process_time() - c0, "messages": n,
                  "peak_rss_mb": peak_mb()}}))
"""

OURS = PEAK + """
import json, time
import goalkit.logs.bagfast, goalkit.logs.bagindex, goalkit.logs.bagros1
goalkit.logs.bagfast.ENABLED = {fast}
goalkit.logs.bagindex.ENABLED = {index}
goalkit.logs.bagros1.ENABLED = {own}
from goalkit.logs import open_logs
from goalkit.logs.episodes import iter_chunks
t, c0 = time.perf_counter(), time.process_time()
src = open_logs({bag!r}, {layout!r})
open_peak = peak_mb()
steps = 0
for es in iter_chunks(src, 100_000):
    steps += es.num_transitions
print(json.dumps({{"seconds": time.perf_counter() - t, "cpu_seconds": time.process_time() - c0,
                  "episodes": src.num_episodes, "steps": steps, "open_peak_rss_mb": open_peak,
                  "peak_rss_mb": peak_mb()}}))
"""


def run(code: str) -> dict:
    out = subprocess.run([sys.executable, "-c", code], check=True,
                         capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def memory_only(args):
    """Peak RSS of goalkit's read of one recording per size (fresh process each)."""
    sizes = [int(x) for x in args.sizes.split(",")]
    out = args.out or str(HERE / "results" / f"bags_{args.storage}_memory.json")
    results = {"what": "goalkit bag read+align alone: peak RSS per size", "storage": args.storage,
               "load_average_at_start": os.getloadavg(), "sizes": []}
    with tempfile.TemporaryDirectory() as tmp:
        for size in sizes:
            bag = Path(tmp) / f"rec{size}{'.bag' if args.storage == 'ros1' else ''}"
            n = write_recording(bag, size, storage=args.storage)
            runs = [run(OURS.format(bag=str(bag), layout=LAYOUT, fast=True, index=True, own=True))
                    for _ in range(args.repeats)]
            row = {"messages": n, "peak_rss_mb": max(r["peak_rss_mb"] for r in runs),
                   "open_peak_rss_mb": max(r["open_peak_rss_mb"] for r in runs),
                   "cpu_seconds": statistics.median(r["cpu_seconds"] for r in runs),
                   "episodes": runs[0]["episodes"], "steps": runs[0]["steps"],
                   "load_average": os.getloadavg(), "runs": runs}
            print(json.dumps({k: v for k, v in row.items() if k != "runs"}), flush=True)
            results["sizes"].append(row)
            bag.unlink()
    s = results["sizes"]
    if len(s) > 1:
        results["rss_growth"] = s[-1]["peak_rss_mb"] / s[0]["peak_rss_mb"]
    Path(out).write_text(json.dumps(results, indent=2) + "\n")
    print(f"written {out}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                 formatter_class=argparse.ArgumentDefaultsHelpFormatter)
    ap.add_argument("--sizes", default="250000,1000000", help="messages per bag, comma separated")
    ap.add_argument("--repeats", type=int, default=3, help="fresh processes per variant and size")
    ap.add_argument("--storage", default="mcap", choices=["mcap", "sqlite", "ros1"],
                    help="how the recording is stored")
    ap.add_argument("--out", default=None,
                    help="results file (default: results/bags.json, bags_sqlite.json or bags_ros1.json)")
    ap.add_argument("--no-varying", action="store_true",
                    help="skip the recording whose layouts vary (fewer runs on a shared machine)")
    ap.add_argument("--memory-only", action="store_true",
                    help="run goalkit alone (no floor, no other variants): peak RSS at each size, "
                         "to see where it levels off")
    args = ap.parse_args(argv)
    if args.memory_only:
        return memory_only(args)
    if args.out is None:
        args.out = str(HERE / "results" / ("bags.json" if args.storage == "mcap" else f"bags_{args.storage}.json"))
    ros1 = args.storage == "ros1"
    varying = not args.no_varying
    sizes = [int(s) for s in args.sizes.split(",")]
    results = {"what": "bag read+align vs plain rosbags deserialise loop", "storage": args.storage,
               "load_average_at_start": os.getloadavg(), "sizes": []}
    with tempfile.TemporaryDirectory() as tmp:
        for size in sizes:
            ext = ".bag" if ros1 else ""
            bag, vbag = Path(tmp) / f"rec{size}{ext}", Path(tmp) / f"vary{size}{ext}"
            t = time.perf_counter()
            n = write_recording(bag, size, storage=args.storage)
            nv = write_recording(vbag, size, vary=True, storage=args.storage) if varying else 0
            print(f"wrote {2 if varying else 1} x {n} messages in {time.perf_counter() - t:.1f} s", flush=True)
            names = ["floor", "goalkit", "goalkit_per_message"]
            names += ["floor_varying", "goalkit_varying", "goalkit_varying_no_index"] if varying else []
            names += ["goalkit_rosbags_index"] if ros1 else []
            runs = {k: [] for k in names}
            ours = lambda path, fast=True, index=True, own=True: run(
                OURS.format(bag=str(path), layout=LAYOUT, fast=fast, index=index, own=own))
            for _ in range(args.repeats):           # interleaved
                runs["floor"].append(run(FLOOR.format(bag=str(bag))))
                runs["goalkit"].append(ours(bag))
                runs["goalkit_per_message"].append(ours(bag, fast=False))
                if ros1:                             # rosbags' own ROS 1 reader (its index in memory)
                    runs["goalkit_rosbags_index"].append(ours(bag, own=False))
                if varying:
                    runs["floor_varying"].append(run(FLOOR.format(bag=str(vbag))))
                    runs["goalkit_varying"].append(ours(vbag))
                    runs["goalkit_varying_no_index"].append(ours(vbag, index=False))
            med = {k: statistics.median(r["seconds"] for r in v) for k, v in runs.items()}
            cpu = {k: statistics.median(r["cpu_seconds"] for r in v) for k, v in runs.items()}
            f_s = med["floor"]
            row = {"messages": n, "floor_seconds": f_s, "goalkit_seconds": med["goalkit"],
                   "floor_cpu_seconds": cpu["floor"], "goalkit_cpu_seconds": cpu["goalkit"],
                   "floor_msgs_per_s": n / f_s, "goalkit_msgs_per_s": n / med["goalkit"],
                   "ratio_to_floor": f_s / med["goalkit"],
                   "cpu_ratio_to_floor": cpu["floor"] / cpu["goalkit"],
                   "per_message_seconds": med["goalkit_per_message"],
                   "per_message_ratio_to_floor": f_s / med["goalkit_per_message"],
                   "per_message_cpu_ratio_to_floor": cpu["floor"] / cpu["goalkit_per_message"],
                   "floor_peak_rss_mb": max(r["peak_rss_mb"] for r in runs["floor"]),
                   "goalkit_peak_rss_mb": max(r["peak_rss_mb"] for r in runs["goalkit"]),
                   "goalkit_open_peak_rss_mb": max(r["open_peak_rss_mb"] for r in runs["goalkit"]),
                   "episodes": runs["goalkit"][0]["episodes"], "steps": runs["goalkit"][0]["steps"]}
            if varying:
                fv_s = med["floor_varying"]
                row.update({"varying_messages": nv, "varying_floor_seconds": fv_s,
                            "varying_seconds": med["goalkit_varying"],
                            "varying_ratio_to_floor": fv_s / med["goalkit_varying"],
                            "varying_no_index_seconds": med["goalkit_varying_no_index"],
                            "varying_no_index_ratio_to_floor": fv_s / med["goalkit_varying_no_index"],
                            "varying_peak_rss_mb": max(r["peak_rss_mb"] for r in runs["goalkit_varying"])})
            if ros1:
                row.update({"rosbags_index_seconds": med["goalkit_rosbags_index"],
                            "rosbags_index_cpu_seconds": cpu["goalkit_rosbags_index"],
                            "rosbags_index_peak_rss_mb": max(r["peak_rss_mb"] for r in runs["goalkit_rosbags_index"])})
            row["load_average"] = os.getloadavg()
            row["runs"] = runs
            # ratio of each repeat (floor and goalkit ran next to each other): median and
            # spread, by wall time and by CPU time of the process (less sensitive to load)
            pairs = [("goalkit", "floor"), ("goalkit_per_message", "floor")]
            pairs += [("goalkit_varying", "floor_varying"), ("goalkit_varying_no_index", "floor_varying")] if varying else []
            pairs += [("goalkit_rosbags_index", "floor")] if ros1 else []
            for name, base in pairs:
                for clock in ("seconds", "cpu_seconds"):
                    rs = [f[clock] / g[clock] for f, g in zip(runs[base], runs[name])]
                    row.setdefault("ratios", {})[f"{name}_{'wall' if clock == 'seconds' else 'cpu'}"] = {
                        "median": statistics.median(rs), "min": min(rs), "max": max(rs)}
            print(json.dumps({k: v for k, v in row.items() if k != "runs"}), flush=True)
            results["sizes"].append(row)
    s = results["sizes"]
    results["target_ratio"] = 0.8
    results["ratio_met"] = all(r["ratio_to_floor"] >= 0.8 for r in s)
    results["cpu_ratio_met"] = all(r["cpu_ratio_to_floor"] >= 0.8 for r in s)
    results["per_message_ratio_met"] = all(r["per_message_ratio_to_floor"] >= 0.8 for r in s)
    if varying:
        results["varying_ratio_met"] = all(r["varying_ratio_to_floor"] >= 0.8 for r in s)
    if len(s) > 1:
        grow = lambda key: s[-1][key] / s[0][key]
        results["rss_growth"] = grow("goalkit_peak_rss_mb")
        results["open_rss_growth"] = grow("goalkit_open_peak_rss_mb")
        results["floor_rss_growth"] = grow("floor_peak_rss_mb")
        worst = results["rss_growth"]
        if varying:
            results["varying_rss_growth"] = grow("varying_peak_rss_mb")
            worst = max(worst, results["varying_rss_growth"])
        if ros1:
            results["rosbags_index_rss_growth"] = grow("rosbags_index_peak_rss_mb")
        results["target_rss_growth"] = 1.3
        results["rss_met"] = worst <= 1.3
    results["load_average_at_end"] = os.getloadavg()
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(results, indent=2) + "\n")
    print(f"written {args.out}")


if __name__ == "__main__":
    main()
