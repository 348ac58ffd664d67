"""Build throughput and memory, as ratios against baselines measured in the same run.

    .venv/bin/python benchmarks/bench_build.py                 # 1M and 10M transitions
    .venv/bin/python benchmarks/bench_build.py --sizes 200000,1000000 --loop-transitions 50000

Logs: demo episodes (goalkit.demo) tiled to the requested size and written as one flat HDF5
log, observations padded to 24 float32 columns (the demo's 9 plus 15 zero columns), T + 1
states per episode. Recipe: goal = head + trays (6 columns), future and final, 2 goals per
transition, euclidean 0.04 sparse, 10 % validation, materialised, no compression.

Baselines, on the same files in the same run:
  floor  a plain h5py read of the log's arrays and a write of the same bytes the build writes
         (same datasets, dtypes, shapes, chunking, no compression), in large slices;
  floor_raw_chunks  the same read, and the same bytes written as whole raw chunks
         (``write_direct_chunk``, the fastest h5py write path; reported, not a target);
  loop   a straightforward per-transition Python loop doing the same relabelling and scoring
         and writing the same columns (run on the first --loop-transitions transitions).
Peak memory is each build's own peak RSS, in a fresh process.

Timings on a shared 2-core machine vary run to run (page-cache write-back, page faults), so
every measurement runs --repeats times, in fresh processes, build and baselines interleaved,
after an ``os.sync()``; the ratios use the median of each, and every run is recorded.

Targets: build >= 0.5 x floor throughput, >= 20 x loop throughput, peak RSS at the largest size
within 1.2 x of that at the smallest (largest peak of the repeats). Results:
benchmarks/results/build.json.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import h5py
import numpy as np

HERE = Path(__file__).resolve().parent
OBS_DIM = 24
GOAL_COLS = [0, 1, 2, 6, 7, 8]
THRESHOLD = 0.04

RECIPE = """
version = 1
seed = 0
[logs]
path = "{logs}"
layout = "{layout}"
[goal]
indices = {goal}
[relabel]
goals_per_transition = 2
[relabel.weights]
future = 1
final = 1
[reward]
distance = "euclidean"
threshold = {thr}
[split]
validation = 0.1
[output]
path = "{out}"
compression = "none"
chunk_rows = 65536
"""

LAYOUT = """
version = 1
shape = "flat"
[keys]
observation = "observations"
action = "actions"
reward = "rewards"
[boundaries]
offsets = "offsets"
"""


def make_logs(path: Path, transitions: int, seed: int = 0) -> dict:
    """Tile demo episodes into a flat HDF5 log of about ``transitions`` transitions."""
    from goalkit.demo import make_demo
    from goalkit.logs import open_logs, load_layout

    with tempfile.TemporaryDirectory() as d:
        info = make_demo(d, episodes=400, seed=seed)
        src = open_logs(info["logs"], load_layout(info["layout"]))
        base = src.read(0, len(src.lengths))
    reps = max(1, math.ceil(transitions / base.num_transitions))
    lengths = np.tile(base.lengths, reps)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    obs = np.zeros((base.observations.shape[0], OBS_DIM), np.float32)
    obs[:, :base.observations.shape[1]] = base.observations
    with h5py.File(path, "w") as f:
        o = f.create_dataset("observations", (obs.shape[0] * reps, OBS_DIM), np.float32, chunks=(65536, OBS_DIM))
        a = f.create_dataset("actions", (base.num_transitions * reps, base.actions.shape[1]), np.float32,
                             chunks=(65536, base.actions.shape[1]))
        r = f.create_dataset("rewards", (base.num_transitions * reps,), np.float32, chunks=(65536,))
        for k in range(reps):
            o[k * obs.shape[0]:(k + 1) * obs.shape[0]] = obs
            a[k * base.num_transitions:(k + 1) * base.num_transitions] = base.actions
            r[k * base.num_transitions:(k + 1) * base.num_transitions] = base.rewards
        f["offsets"] = offsets
    return {"transitions": int(offsets[-1]), "episodes": int(len(lengths))}


def run_child(code: str) -> dict:
    """Run ``code`` in a fresh interpreter; it prints one JSON line; add its peak RSS."""
    wrapper = code + textwrap.dedent(f"""
        import json as _j, sys as _s
        _s.path.insert(0, {str(HERE)!r})
        from tools.peakrss import peak_rss_mb   # this image's own peak; ru_maxrss carries the parent's
        RESULT["peak_rss_mb"] = peak_rss_mb()
        print(_j.dumps(RESULT))
    """)
    out = subprocess.run([sys.executable, "-c", wrapper], capture_output=True, text=True)
    if out.returncode:
        raise RuntimeError(f"benchmark child failed:\n{out.stderr}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def time_build(recipe_path: Path) -> dict:
    return run_child(textwrap.dedent(f"""
        import time
        from goalkit.pipeline.recipe import load_recipe
        from goalkit.pipeline.build import build
        t = time.perf_counter()
        res = build(load_recipe({str(recipe_path)!r}), card=False)
        RESULT = {{"seconds": time.perf_counter() - t, "rows": sum(res.summary["rows"].values())}}
    """))


def time_floor(logs: Path, built: Path, raw_chunks: bool = False) -> dict:
    """Read the log's arrays, write the same bytes the build wrote (same datasets and chunks).

    ``raw_chunks``: write whole chunks with ``write_direct_chunk`` instead of slice assignment.
    """
    if raw_chunks:
        options, write = ', rdcc_nbytes=0', """
                    c = ds.chunks[0]
                    buf = np.zeros((c,) + ds.shape[1:], ds.dtype)
                    for i in range(0, ds.shape[0], c):
                        out.id.write_direct_chunk((i,) + (0,) * (buf.ndim - 1), buf)"""
    else:
        options, write = '', """
                    buf = np.zeros((min(step, ds.shape[0]),) + ds.shape[1:], ds.dtype)
                    for i in range(0, ds.shape[0], step):
                        n = min(step, ds.shape[0] - i)
                        out[i:i + n] = buf[:n]"""
    return run_child(textwrap.dedent(f"""
        import time, h5py, numpy as np
        t = time.perf_counter()
        step = 1 << 20
        with h5py.File({str(logs)!r}) as src, h5py.File({str(built)!r}) as ref, \\
             h5py.File({str(built) + '.floor'!r}, "w"{options}) as dst:
            arrays = [src[k] for k in ("observations", "actions", "rewards")]
            for a in arrays:                      # the read half
                for i in range(0, a.shape[0], step):
                    a[i:i + step]
            for split in ("train", "validation"):  # the write half: same datasets, same bytes
                g = dst.create_group(split)
                for name, ds in ref[split].items():
                    out = g.create_dataset(name, ds.shape, ds.dtype, chunks=ds.chunks, maxshape=ds.maxshape){write}
        RESULT = {{"seconds": time.perf_counter() - t}}
        import os; os.remove({str(built) + '.floor'!r})
    """))


def time_loop(logs: Path, out: Path, limit: int) -> dict:
    """A per-transition Python loop: same relabelling (future, final), scoring and columns."""
    return run_child(textwrap.dedent(f"""
        import time, math, random, h5py, numpy as np
        t0 = time.perf_counter()
        goal_cols = {GOAL_COLS}
        thr = {THRESHOLD}
        rnd = random.Random(0)
        with h5py.File({str(logs)!r}) as f:
            offsets = f["offsets"][:]
            done = 0
            rows = {{k: [] for k in ("source_episode", "source_step", "slot", "strategy", "goal_episode",
                                     "goal_step", "steps_to_goal", "goal", "goal_distance", "reward",
                                     "reached", "observation", "action", "next_observation", "reached_goal")}}
            obs_ds, act_ds = f["observations"], f["actions"]
            e = 0
            while done < {limit}:
                T = int(offsets[e + 1] - offsets[e])
                s0 = int(offsets[e]) + e
                states = obs_ds[s0:s0 + T + 1]
                acts = act_ds[int(offsets[e]):int(offsets[e + 1])]
                for t in range(T):
                    for slot in range(2):
                        strategy = 2 if rnd.random() < 0.5 else 1
                        j = rnd.randint(t + 1, T) if strategy == 2 else T
                        goal = [float(states[j][c]) for c in goal_cols]
                        reached_goal = [float(states[t + 1][c]) for c in goal_cols]
                        d = math.sqrt(sum((a - b) ** 2 for a, b in zip(reached_goal, goal)))
                        ok = d <= thr
                        for k, v in (("source_episode", e), ("source_step", t), ("slot", slot),
                                     ("strategy", strategy), ("goal_episode", e), ("goal_step", j),
                                     ("steps_to_goal", j - t), ("goal", goal), ("goal_distance", d),
                                     ("reward", float(ok)), ("reached", int(ok)), ("observation", states[t]),
                                     ("action", acts[t]), ("next_observation", states[t + 1]),
                                     ("reached_goal", reached_goal)):
                            rows[k].append(v)
                    done += 1
                e += 1
        with h5py.File({str(out)!r}, "w") as g:
            grp = g.create_group("train")
            for k, v in rows.items():
                grp.create_dataset(k, data=np.asarray(v), chunks=True)
        RESULT = {{"seconds": time.perf_counter() - t0, "transitions": done}}
        import os; os.remove({str(out)!r})
    """))


def settle() -> None:
    """Write back dirty pages and pause, so one run's write-back does not land in the next."""
    os.sync()
    time.sleep(1.0)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--sizes", default="1000000,10000000", help="transition counts, comma-separated")
    p.add_argument("--loop-transitions", type=int, default=100_000, help="transitions for the loop baseline")
    p.add_argument("--work", default=str(HERE / "work"), help="folder for logs and outputs (deleted after)")
    p.add_argument("--repeats", type=int, default=3, help="runs of each measurement (medians are used)")
    p.add_argument("--out", default=str(HERE / "results" / "build.json"))
    args = p.parse_args(argv)
    work = Path(args.work)
    work.mkdir(parents=True, exist_ok=True)
    sizes = [int(float(s)) for s in args.sizes.split(",")]
    results = {"machine": {"cpus": os.cpu_count()}, "sizes": {}}
    for n in sizes:
        logs, layout, recipe, out = (work / f"logs-{n}.h5", work / "layout.toml", work / f"recipe-{n}.toml",
                                     work / f"goals-{n}.h5")
        meta = make_logs(logs, n)
        layout.write_text(LAYOUT)
        recipe.write_text(RECIPE.format(logs=logs, layout=layout, goal=GOAL_COLS, thr=THRESHOLD, out=out))
        runs = {"build": [], "floor": [], "floor_raw_chunks": []}
        peaks = []
        for _ in range(args.repeats):
            out.unlink(missing_ok=True)  # every build writes a new file, as the floor does
            settle()
            b = time_build(recipe)
            runs["build"].append(b["seconds"])
            peaks.append(b["peak_rss_mb"])
            settle()
            runs["floor"].append(time_floor(logs, out)["seconds"])
            settle()
            runs["floor_raw_chunks"].append(time_floor(logs, out, raw_chunks=True)["seconds"])
        sec = {k: statistics.median(v) for k, v in runs.items()}
        tps = meta["transitions"]
        row = {**meta, "build_seconds": sec["build"], "build_peak_rss_mb": max(peaks),
               "build_transitions_per_s": tps / sec["build"],
               "floor_seconds": sec["floor"], "floor_transitions_per_s": tps / sec["floor"],
               "floor_raw_chunks_seconds": sec["floor_raw_chunks"],
               "runs_seconds": runs, "runs_peak_rss_mb": peaks,
               "output_bytes": out.stat().st_size}
        row["build_over_floor"] = sec["floor"] / sec["build"]
        row["build_over_floor_raw_chunks"] = sec["floor_raw_chunks"] / sec["build"]
        if n == sizes[0]:
            limit = min(args.loop_transitions, meta["transitions"])
            loops = []
            for _ in range(args.repeats):
                settle()
                loops.append(time_loop(logs, work / "loop.h5", limit))
            lsec = statistics.median(lp["seconds"] for lp in loops)
            results["loop"] = {"transitions": loops[0]["transitions"], "seconds": lsec,
                               "runs_seconds": [lp["seconds"] for lp in loops],
                               "transitions_per_s": loops[0]["transitions"] / lsec}
            row["build_over_loop"] = row["build_transitions_per_s"] / results["loop"]["transitions_per_s"]
        results["sizes"][str(n)] = row
        print(json.dumps({str(n): row}), flush=True)
        for path in (logs, out):
            path.unlink(missing_ok=True)
    first, last = results["sizes"][str(sizes[0])], results["sizes"][str(sizes[-1])]
    results["memory_ratio_largest_over_smallest"] = last["build_peak_rss_mb"] / first["build_peak_rss_mb"]
    results["targets"] = {
        "build_over_floor>=0.5": min(r["build_over_floor"] for r in results["sizes"].values()) >= 0.5,
        "build_over_loop>=20": first["build_over_loop"] >= 20,
        "memory_ratio<=1.2": results["memory_ratio_largest_over_smallest"] <= 1.2,
    }
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(results, indent=2, sort_keys=True))
    print(json.dumps(results["targets"]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
