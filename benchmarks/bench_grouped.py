"""Build speed on logs shaped as users keep them: the demo's grouped HDF5 logs and recipe.

    .venv/bin/python benchmarks/bench_grouped.py                    # 200k transitions (~1-2 min)
    .venv/bin/python benchmarks/bench_grouped.py --large            # also 1M transitions (~5 min)
    .venv/bin/python benchmarks/bench_grouped.py --workers 0 --dask 0   # skip the scaling runs

Logs: ``goalkit.demo.make_demo`` (one HDF5 group per episode, seven gzip datasets each, about
47 transitions per episode): 4,250 episodes (about 200k transitions), and with ``--large``
21,000 episodes (about 1M). Recipe: the demo's own (5 goals per transition: original, final,
future x2, geometric with gamma 0.9; euclidean reward within the watering radius; 10 %
validation; gzip output in chunks of 65,536 rows).

Cases, each in a fresh process (so that the peak RSS is the case's own), in one run:

* ``build-1cpu``: ``goalkit.build`` of the demo recipe, one process restricted to CPU 0 (the
  case's process calls ``os.sched_setaffinity(0, {0})`` first, as ``taskset -c 0`` would;
  the processes it starts inherit it, and goalkit's reader and planning helpers stay off with
  one CPU): the one-core baseline of the scaling figures;
* ``build``: the same on both CPUs (the default build: a reader process, a planning helper
  for large logs, compression threads);
* ``build-workers-N``: the same with ``workers=N`` (local worker processes);
* ``dask-N``: the same on a ``distributed.LocalCluster(n_workers=N, threads_per_worker=1,
  processes=True)`` through ``goalkit.DaskCluster(client)``; the cluster is started (its workers
  up) before the timed part and closed after it, so only the build is timed; its CPU seconds add
  the worker processes' (psutil) to the case's own. Its workers have imported nothing of
  goalkit: this is a cluster's first goalkit build;
* ``dask-N-preloaded``: the same on a cluster whose workers import goalkit when they start
  (``preload=["goalkit.dask_preload"]``, as ``dask worker --preload goalkit.dask_preload``
  does): the state every build after a cluster's first finds its workers in (a worker keeps
  its imports);
* ``script``: a plain numpy + h5py relabelling script kept below (:func:`script_case`): reads
  every episode group, draws the demo recipe's mixture per goal slot, scores the same reward,
  and writes the same number of rows with comparable columns, gzip, in the same chunks;
* ``floor``: low-level h5py reads of every dataset of every episode group (``h5g.open``,
  ``h5d.open``, ``read`` into preallocated arrays), plus writing the very bytes the build
  wrote (every column of the built set, read back untimed) through HDF5's own gzip filter;
  only those reads and writes are timed.

Also measured, once, outside the cases: the build's phases on the same logs, one after the
other in one process (plan = ``make_plan``; read = ``source.read`` of every chunk; relabel =
``relabel_chunk``; write = the same ``SetWriter`` calls as the build).

Reported: wall and CPU seconds of each case (CPU: user + system of the case's process and its
finished children), the ratios build/script and build/floor by wall time and by CPU time
(speed ratios: ``t_script / t_build``; above 1 the build is faster), the speed-ups of one
process on 2 CPUs, of the workers and of Dask over one process on 1 CPU (and of the workers
and Dask over the default build), whether every build wrote the same bytes (SHA-256), peak RSS
per case and the 1M/200k ratio. Whether the two cores were free: the load average before and
after each case, and ``others_cpus_busy``, the CPU seconds the rest of the machine used while
the case's process ran (``/proc/stat`` busy time of all CPUs minus the case's own CPU seconds)
per second of it: near 0 means both cores were the case's. The machine is shared with other
jobs: wall-clock figures move with their load; the ratios of cases measured in the same run,
and the CPU seconds, are the figures to compare. With ``--repeats N`` every case but the phases
runs N times, the rounds interleaved (build, floor, script, workers, Dask, ...), and each case
reports its median run (of an even number, the slower of the two middle ones); ``quiet_*``
ratios use only the runs during which the rest of the machine kept fewer than
:data:`QUIET_CPUS` CPUs busy. Every round opens and closes with the one-CPU build, and the
``paired_*`` speed-ups take each round's cases against the mean of those two runs, then the
median over rounds: this host's speed drifts by 10-25 % over minutes (the same one-CPU build
took 5.9 to 7.9 s within a few minutes, with no steal time and no other load), and a round's
cases share its drift where the medians of separate cases do not. Both are reported.

Targets (issue 14): build >= 1.5x the script's speed and >= 0.8x the floor's; peak RSS at 1M
<= 1.2x that at 200k; workers=2 and Dask with 2 workers >= 1.6x one process on one CPU when
two cores are free (Dask: reported for a cluster's first build and for preloaded workers).
Before any case, goalkit's modules are compiled to bytecode (``tools/bytecode.py``), as an
installed copy has them, so that no case's interpreters compile goalkit's sources; the report
says so under ``bytecode``.
Results: ``benchmarks/results/grouped.json``. The flat best case stays in bench_build.py.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE))

from tools.bytecode import compile_package  # noqa: E402
from tools.peakrss import peak_rss_mb as image_peak_rss_mb  # noqa: E402

SIZES = {"200k": 4_250, "1M": 21_000}        # demo episodes (about 47 transitions each)
#: The demo recipe's mixture and reward (goalkit/demo/files.py: recipe_text), for the script.
WEIGHTS = {"original": 1, "final": 1, "future": 2, "geometric": 1}
GAMMA = 0.9
GOALS_PER_TRANSITION = 5
EPISODES_PER_BLOCK = 1_000


def cpu_seconds() -> float:
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def peak_rss_mb() -> dict:
    """This process image's peak (``VmHWM``: ru_maxrss would carry the benchmark parent's peak,
    e.g. after it generated the 1M logs, see tools/peakrss.py), and the largest peak among its
    finished children (ru_maxrss of RUSAGE_CHILDREN: a child forked from a large process
    starts at that process's size)."""
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return {"peak_rss_mb": image_peak_rss_mb(), "children_peak_rss_mb": kids.ru_maxrss / 1024}


# ---- the plain numpy + h5py script (the baseline a team would write) -------------------------

#: The script's columns: (dtype, width; 0 for a scalar column).
SCRIPT_COLUMNS = {"observation": ("f8", 9), "action": ("f4", 3), "next_observation": ("f8", 9),
                  "goal": ("f4", 6), "reached_goal": ("f4", 6), "reward": ("f4", 0), "terminal": ("u1", 0),
                  "strategy": ("u1", 0), "episode": ("i8", 0), "step": ("i8", 0), "goal_step": ("i8", 0),
                  "slot": ("i8", 0), "distance": ("f4", 0), "task_reward": ("f4", 0)}


def script_case(logs: str, out: str, threshold: float, seed: int = 0) -> dict:
    """Hindsight relabelling of grouped logs with numpy and h5py, block of episodes by block."""
    import h5py
    import numpy as np

    def blocks():
        with h5py.File(logs, "r") as src:
            groups = sorted(src["bench"].keys())
            for b in range(0, len(groups), EPISODES_PER_BLOCK):
                obs, act, rew, tgoal = [], [], [], []
                for name in groups[b:b + EPISODES_PER_BLOCK]:
                    g = src["bench"][name]
                    obs.append(np.concatenate([g["head"][()], g["head_velocity"][()], g["trays"][()]], axis=1))
                    act.append(g["action"][()])
                    rew.append(g["reward"][()])
                    tgoal.append(g["task_goal"][()])
                yield b, obs, act, rew, tgoal

    return relabel_blocks(blocks(), out, threshold, seed)


def relabel_blocks(blocks, out: str, threshold: float, seed: int = 0) -> dict:
    """The script's relabelling and writing, for blocks ``(first episode, observations, actions,
    rewards, task goals)`` of per-episode arrays, however they were read."""
    import h5py
    import numpy as np

    rng = np.random.default_rng(seed)
    names = list(WEIGHTS)
    p = np.array([WEIGHTS[n] for n in names], float)
    p /= p.sum()
    K = GOALS_PER_TRANSITION
    rows = 0
    with h5py.File(out, "w") as dst:
        sets = {}
        for split in ("train", "validation"):
            g = dst.create_group(split)
            sets[split] = {c: g.create_dataset(c, (0,) + ((w,) if w else ()), dt, maxshape=(None,) + ((w,) if w else ()),
                                               chunks=(65536,) + ((w,) if w else ()), compression="gzip",
                                               compression_opts=4, shuffle=True)
                           for c, (dt, w) in SCRIPT_COLUMNS.items()}
        for b, obs, act, rew, tgoal in blocks:
            T = np.array([len(a) for a in act])
            ep = np.repeat(np.arange(b, b + len(T)), T)
            start_t = np.repeat(np.cumsum(T) - T, T)               # first transition row of the episode
            start_s = start_t + np.repeat(np.arange(len(T)), T)     # first state row of the episode
            t = np.arange(T.sum()) - start_t
            Te = np.repeat(T, T)
            states = np.concatenate(obs)
            goal_of = np.concatenate([states[:, 0:3], states[:, 6:9]], axis=1).astype(np.float32)
            n = len(t) * K
            t_k, Te_k, s_k = np.repeat(t, K), np.repeat(Te, K), np.repeat(start_s, K)
            strat = rng.choice(len(names), size=n, p=p)
            j = np.where(strat == 1, Te_k, 0)
            fut = strat == 2
            j[fut] = t_k[fut] + 1 + (rng.random(fut.sum()) * (Te_k[fut] - t_k[fut])).astype(np.int64)
            geo = strat == 3
            j[geo] = np.minimum(t_k[geo] + rng.geometric(1 - GAMMA, geo.sum()), Te_k[geo])
            orig = strat == 0
            goal = goal_of[s_k + j]
            goal[orig] = np.concatenate(tgoal).astype(np.float32)[np.repeat(np.arange(len(t)), K)[orig]]
            j[orig] = -1
            achieved = goal_of[s_k + t_k + 1]
            dist = np.linalg.norm(achieved.astype(np.float64) - goal, axis=1)
            reached = dist <= threshold
            row = {"observation": states[s_k + t_k], "action": np.concatenate(act)[np.repeat(np.arange(len(t)), K)],
                   "next_observation": states[s_k + t_k + 1], "goal": goal, "reached_goal": achieved,
                   "reward": reached.astype(np.float32), "terminal": reached.astype(np.uint8),
                   "strategy": strat.astype(np.uint8), "episode": np.repeat(ep, K), "step": t_k, "goal_step": j,
                   "slot": np.tile(np.arange(K), len(t)), "distance": dist.astype(np.float32),
                   "task_reward": np.concatenate(rew)[np.repeat(np.arange(len(t)), K)]}
            val = (np.repeat(ep, K) * 2654435761 % 10) == 0       # about 10 % of episodes
            for split, keep in (("train", ~val), ("validation", val)):
                m = int(keep.sum())
                for c, ds in sets[split].items():
                    ds.resize(ds.shape[0] + m, axis=0)
                    ds[-m:] = row[c][keep]
            rows += n
    return {"rows": rows}


# ---- the low-level floor --------------------------------------------------------------------

def floor_case(logs: str, built: str, out: str) -> dict:
    """Low-level reads of every dataset; then the built set's bytes written through HDF5's gzip."""
    import h5py
    import numpy as np

    wall = cpu = 0.0
    values = 0
    t0, c0 = time.perf_counter(), time.thread_time()
    with h5py.File(logs, "r") as src:
        parent = src["bench"].id
        for name in sorted(src["bench"].keys()):
            g = h5py.h5g.open(parent, name.encode())
            for key in (b"head", b"head_velocity", b"trays", b"action", b"reward", b"success", b"task_goal"):
                d = h5py.h5d.open(g, key)
                buf = np.empty(d.shape, d.dtype)
                d.read(h5py.h5s.ALL, h5py.h5s.ALL, buf)
                values += buf.size
            h5py.h5a.open(g, b"task").read(np.empty((), np.int64))
    wall += time.perf_counter() - t0
    cpu += time.thread_time() - c0
    written = 0
    with h5py.File(built, "r") as ref, h5py.File(out, "w") as dst:
        for split in ("train", "validation"):
            for col, ds in ref[split].items():
                if not isinstance(ds, h5py.Dataset) or ds.shape[0] == 0:
                    continue
                t0, c0 = time.perf_counter(), time.thread_time()
                o = dst.create_dataset(f"{split}/{col}", ds.shape, ds.dtype, chunks=ds.chunks,
                                       compression="gzip", compression_opts=4, shuffle=True)
                wall += time.perf_counter() - t0
                cpu += time.thread_time() - c0
                step = ds.chunks[0] * 4
                for i in range(0, ds.shape[0], step):
                    block = ds[i:i + step]                       # decompressing the reference: untimed
                    t0, c0 = time.perf_counter(), time.thread_time()
                    o[i:i + len(block)] = block
                    wall += time.perf_counter() - t0
                    cpu += time.thread_time() - c0
                    written += block.nbytes
        t0, c0 = time.perf_counter(), time.thread_time()
    wall += time.perf_counter() - t0
    cpu += time.thread_time() - c0
    return {"timed_seconds": wall, "timed_cpu_seconds": cpu, "values_read": values, "bytes_written": written}


# ---- goalkit cases --------------------------------------------------------------------------

def build_case(recipe_path: str, out: str, workers: int) -> dict:
    import goalkit

    runner = goalkit.LocalWorkers(workers) if workers else None
    res = goalkit.build(recipe_path, out=out, runner=runner, card=False)
    return {"rows": int(sum(res.summary["rows"].values())), "cpus": len(os.sched_getaffinity(0))}


def dask_case(recipe_path: str, out: str, workers: int, preload: bool = False) -> dict:
    """``goalkit.build`` on a Dask ``LocalCluster`` of ``workers`` single-threaded worker processes.

    The cluster is started (and its workers are up) before the timed part and closed after it;
    only the build is timed. With ``preload`` its workers import goalkit as they start
    (``goalkit.dask_preload``). CPU seconds: this process's own during the build plus those the
    cluster's worker processes used meanwhile (read with psutil before and after).
    """
    import logging

    import psutil
    from distributed import Client, LocalCluster

    import goalkit

    logging.getLogger("distributed").setLevel(logging.ERROR)
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None,
                      preload=["goalkit.dask_preload"] if preload else None) as cluster, \
            Client(cluster) as client:
        client.wait_for_workers(workers)
        me = psutil.Process()

        def kids_cpu():
            total = 0.0
            for k in me.children(recursive=True):
                try:
                    t = k.cpu_times()
                    total += t.user + t.system
                except psutil.Error:
                    pass
            return total

        k0, c0, t0 = kids_cpu(), time.process_time(), time.perf_counter()
        res = goalkit.build(recipe_path, out=out, runner=goalkit.DaskCluster(client), card=False)
        timed = {"seconds": time.perf_counter() - t0,
                 "cpu_seconds": time.process_time() - c0 + kids_cpu() - k0}
    return {"rows": int(sum(res.summary["rows"].values())), "cpus": len(os.sched_getaffinity(0)),
            "timed": timed, "preload": preload,
            "note": "LocalCluster started before and closed after the timed part"}


def phases_case(recipe_path: str, out: str) -> dict:
    """The build's phases one after the other (not overlapped as in the build itself)."""
    from goalkit.pipeline.build import chunk_transitions
    from goalkit.pipeline.chunk import relabel_chunk
    from goalkit.pipeline.plan import make_plan, split_rows
    from goalkit.pipeline.recipe import load_recipe
    from goalkit.pipeline.shardfiles import plan_shards
    from goalkit.write.writer import SetWriter

    recipe = load_recipe(recipe_path).with_overrides(out=out)
    t, cpu = {}, {}
    t0, c0 = time.perf_counter(), cpu_seconds()
    plan, source = make_plan(recipe)
    t["plan"], cpu["plan"] = time.perf_counter() - t0, cpu_seconds() - c0
    chunks = plan_shards(plan, chunk_transitions(plan))
    t["read"] = t["relabel"] = t["write"] = 0.0
    cpu["read"] = cpu["relabel"] = cpu["write"] = 0.0
    o = recipe.output
    with SetWriter(o.path, plan.columns, chunk_rows=o.chunk_rows, compression=o.compression,
                   total_rows=split_rows(plan)) as writer:
        for spec in chunks:
            t0, c0 = time.perf_counter(), cpu_seconds()
            chunk = source.read(spec.start, spec.stop)
            t1, c1 = time.perf_counter(), cpu_seconds()
            rows = relabel_chunk(plan, chunk, defer_gathers=True)
            t2, c2 = time.perf_counter(), cpu_seconds()
            for split, cols in rows.columns.items():
                writer.add(split, cols, rows.keys[split])
            writer.flush()
            t3, c3 = time.perf_counter(), cpu_seconds()
            t["read"] += t1 - t0
            t["relabel"] += t2 - t1
            t["write"] += t3 - t2
            cpu["read"] += c1 - c0
            cpu["relabel"] += c2 - c1
            cpu["write"] += c3 - c2
        t0, c0 = time.perf_counter(), cpu_seconds()
        writer.close(attrs={"benchmark": "phases"})
        t["write"] += time.perf_counter() - t0
        cpu["write"] += cpu_seconds() - c0
    return {"phases_seconds": t, "phases_cpu_seconds": cpu}


def child(args) -> None:
    """Run one case in this (fresh) process and print its JSON line."""
    if args.cpus:        # as ``taskset -c 0,..``: this process and every process it starts
        os.sched_setaffinity(0, set(range(args.cpus)))
    c0, t0 = cpu_seconds(), time.perf_counter()
    if args.case == "dask":
        res = dask_case(args.recipe, args.out, args.workers, args.preload)
        res.update(res.pop("timed"), **peak_rss_mb())
        res["process_cpu_seconds"] = cpu_seconds()
        print(json.dumps(res))
        return
    if args.case == "script":
        info = json.loads(Path(args.info).read_text())
        res = script_case(info["logs"], args.out, info["threshold"])
    elif args.case == "floor":
        info = json.loads(Path(args.info).read_text())
        res = floor_case(info["logs"], args.built, args.out)
    elif args.case == "phases":
        res = phases_case(args.recipe, args.out)
    else:
        res = build_case(args.recipe, args.out, args.workers)
    res.update(seconds=time.perf_counter() - t0, cpu_seconds=cpu_seconds() - c0, **peak_rss_mb())
    res["process_cpu_seconds"] = cpu_seconds()
    print(json.dumps(res))


def machine_cpu_seconds() -> list:
    """Busy CPU seconds of each CPU of the machine since boot (``/proc/stat``: all but idle and iowait)."""
    tick = os.sysconf("SC_CLK_TCK")
    out = []
    with open("/proc/stat") as f:
        for line in f:
            if line.startswith("cpu") and line[3].isdigit():
                v = [int(x) for x in line.split()[1:]]
                out.append((sum(v[:8]) - v[3] - v[4]) / tick)
    return out


def run(args_list) -> dict:
    """Run one case in a fresh process; add the load average and the other processes' CPU use.

    ``others_cpu_seconds``: busy CPU seconds of the CPUs the case may run on (all of them, or
    those of ``--cpus``) while its process ran, minus the case's own CPU seconds (its whole
    process tree, from its start to its exit); ``others_cpus_busy`` is that per second: the
    evidence that the cores were the case's (near 0) or shared (near 1: one CPU's worth taken).
    """
    load0, busy0, t0 = os.getloadavg(), machine_cpu_seconds(), time.perf_counter()
    r = _run(args_list)
    wall, busy1, load1 = time.perf_counter() - t0, machine_cpu_seconds(), os.getloadavg()
    # the CPUs the case could use: all, or the first N of a case restricted with --cpus N
    n = int(args_list[args_list.index("--cpus") + 1]) if "--cpus" in args_list else len(busy1)
    whole = sum(busy1[:n]) - sum(busy0[:n])
    own = r.get("process_cpu_seconds", r["cpu_seconds"])
    r.update(load_average_before=load0, load_average_after=load1, case_process_wall_seconds=wall,
             machine_busy_cpu_seconds=whole, others_cpu_seconds=max(0.0, whole - own),
             others_cpus_busy=max(0.0, whole - own) / wall)
    return r


def _run(args_list) -> dict:
    proc = subprocess.run([sys.executable, __file__, "--child", *args_list], capture_output=True, text=True,
                          cwd=str(ROOT), env={**os.environ, "PYTHONPATH": str(ROOT)})
    if proc.returncode:
        raise RuntimeError(f"benchmark case {args_list} failed:\n{proc.stderr[-4000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def logs(folder: Path, episodes: int) -> dict:
    """Demo logs in ``folder`` (reused when an earlier run wrote the same size)."""
    marker = folder / "bench-logs.json"
    if marker.exists():
        info = json.loads(marker.read_text())
        if info.get("episodes") == episodes:
            return info
    from goalkit.demo import make_demo
    from goalkit.demo.files import THRESHOLD

    folder.mkdir(parents=True, exist_ok=True)
    info = make_demo(folder, episodes=episodes, seed=0, replace=True)
    info = {k: str(v) if isinstance(v, Path) else v for k, v in info.items()}
    info["threshold"] = THRESHOLD
    marker.write_text(json.dumps(info))
    return info


#: A case ran on free cores when the rest of the machine kept less than this many CPUs busy meanwhile.
QUIET_CPUS = 0.15


def paired_ratios(rounds: list, names: list) -> tuple[dict, dict]:
    """Speed-ups over the one-CPU build, paired within each round.

    ``rounds`` holds, per round, each case's wall seconds in the order run (``build-1cpu``
    twice: first and last). A round's baseline is the mean of its two one-CPU runs, and each
    case's speed-up is that baseline over the case's seconds; the reported figure is the median
    over rounds (the middle one, or the mean of the two middle ones).

    Returns
    -------
    (dict, dict)
        ``paired_<case>_speed_over_1cpu_wall`` -> median speed-up, and case -> the per-round list.
    """
    import statistics

    per_round = {n: [] for n in names}
    for r in rounds:
        base = statistics.fmean(r["build-1cpu"])
        for n in names:
            per_round[n].append(base / r[n][0])
    return ({f"paired_{n.replace('-', '_')}_speed_over_1cpu_wall": statistics.median(v) for n, v in per_round.items()},
            per_round)


def measure(label: str, folder: Path, episodes: int, workers: list[int], phases: bool, dask: list[int],
            repeats: int = 1, only_scaling: bool = False) -> dict:
    info = logs(folder, episodes)
    marker = str(folder / "bench-logs.json")
    built, out = str(folder / "bench-goals.h5"), str(folder / "bench-other.h5")
    result = {"episodes": episodes, "transitions": info["steps"], "load_average_before": os.getloadavg(),
              "cpus": len(os.sched_getaffinity(0))}
    cases = {}

    def case(name, *extra, out_path=out):
        Path(out_path).unlink(missing_ok=True)
        kind = "dask" if name.startswith("dask") else name.split("-")[0]
        r = run(["--case", kind, "--recipe", info["recipe"], "--info", marker, "--out", out_path, *extra])
        if kind in ("build", "dask"):
            r["sha256"] = file_sha256(out_path)
        cases[name] = r
        print(f"{label:>5} {name:<16} wall {r['seconds']:7.2f} s  cpu {r['cpu_seconds']:7.2f} s  "
              f"peak RSS {r['peak_rss_mb']:6.0f} MiB  load {r['load_average_before'][0]:.2f}->"
              f"{r['load_average_after'][0]:.2f}  others busy {r['others_cpus_busy']:.2f} CPUs", flush=True)

    # scaling: one process on one CPU (the baseline), on two, then the workers and Dask; with
    # repeats, the rounds are interleaved and each case keeps every run (its median is reported)
    scaling = [("build-1cpu", ("--workers", "0", "--cpus", "1"), out), ("build", ("--workers", "0"), built)]
    if not only_scaling:   # the script and the floor (which reads the set just built) in every round
        scaling += [("floor", ("--built", built), out), ("script", (), out)]
    scaling += [(f"build-workers-{w}", ("--workers", str(w)), out) for w in workers]
    scaling += [(f"dask-{w}", ("--workers", str(w)), out) for w in dask]
    scaling += [(f"dask-{w}-preloaded", ("--workers", str(w), "--preload"), out) for w in dask]
    # the one-CPU baseline is run again at the end of every round: each round's speed-ups are
    # taken against the mean of the two runs that bracket it (see paired_ratios)
    scaling.append(scaling[0])
    runs = {name: [] for name, _, _ in scaling}
    rounds = []
    for _ in range(max(1, repeats)):
        this = {}
        for name, extra, path in scaling:
            case(name, *extra, out_path=path)
            runs[name].append(cases[name])
            this.setdefault(name, []).append(cases[name]["seconds"])
        rounds.append(this)
    for name, got in runs.items():
        got = sorted(got, key=lambda r: r["seconds"])
        cases[name] = dict(got[len(got) // 2], runs=[{k: r[k] for k in ("seconds", "cpu_seconds", "others_cpus_busy",
                                                                         "load_average_before", "load_average_after")}
                                                     for r in runs[name]])
    if phases and not only_scaling:
        case("phases")
    for p in (built, out):
        Path(p).unlink(missing_ok=True)
    b = cases["build"]
    ratios = {}
    if not only_scaling:
        s, f = cases["script"], cases["floor"]
        ratios = {
            "build_speed_over_script_wall": s["seconds"] / b["seconds"],
            "build_speed_over_script_cpu": s["cpu_seconds"] / b["cpu_seconds"],
            "build_speed_over_floor_wall": f["timed_seconds"] / b["seconds"],
            "build_speed_over_floor_cpu": f["timed_cpu_seconds"] / b["cpu_seconds"],
        }
    one = cases["build-1cpu"]["seconds"]
    ratios["one_process_2cpu_speed_over_1cpu_wall"] = one / b["seconds"]
    for w in workers:
        ratios[f"workers_{w}_speed_over_one_process_wall"] = b["seconds"] / cases[f"build-workers-{w}"]["seconds"]
        ratios[f"workers_{w}_speed_over_1cpu_wall"] = one / cases[f"build-workers-{w}"]["seconds"]
    for w in dask:
        ratios[f"dask_{w}_speed_over_one_process_wall"] = b["seconds"] / cases[f"dask-{w}"]["seconds"]
        ratios[f"dask_{w}_speed_over_1cpu_wall"] = one / cases[f"dask-{w}"]["seconds"]
        ratios[f"dask_{w}_preloaded_speed_over_1cpu_wall"] = one / cases[f"dask-{w}-preloaded"]["seconds"]
    quiet = {}
    for name in runs:
        calm = sorted(r["seconds"] for r in runs[name] if r["others_cpus_busy"] < QUIET_CPUS)
        quiet[name] = calm[len(calm) // 2] if calm else None
    q1 = quiet["build-1cpu"]
    for name in runs:
        if name not in ("build-1cpu", "script", "floor") and q1 is not None and quiet[name] is not None:
            ratios[f"quiet_{name.replace('-', '_')}_speed_over_1cpu_wall"] = q1 / quiet[name]
    if not only_scaling and quiet["script"] is not None and quiet["build"] is not None:
        ratios["quiet_build_speed_over_script_wall"] = quiet["script"] / quiet["build"]
    paired, per_round = paired_ratios(rounds, [n for n in runs if n not in ("build-1cpu", "script", "floor")])
    ratios.update(paired)
    result["per_round_speed_over_1cpu"] = per_round
    result["paired_rule"] = ("paired_*: the median over rounds of each round's speed-up, against the mean of the "
                             "two one-CPU runs that open and close that round (the host's speed drifts between "
                             "rounds; a round's cases share its drift)")
    result["quiet_seconds"] = quiet
    result["quiet_rule"] = f"median over the runs during which the rest of the machine kept < {QUIET_CPUS} CPUs busy"
    digests = {n: c["sha256"] for n, c in cases.items() if "sha256" in c}
    result.update(cases=cases, ratios=ratios, load_average_after=os.getloadavg(),
                  same_bytes=len(set(digests.values())) == 1)
    if not only_scaling:
        print(f"{label:>5} build speed / script: {ratios['build_speed_over_script_wall']:.2f}x wall, "
              f"{ratios['build_speed_over_script_cpu']:.2f}x CPU; / floor: "
              f"{ratios['build_speed_over_floor_wall']:.2f}x wall, {ratios['build_speed_over_floor_cpu']:.2f}x CPU",
              flush=True)
    print(f"{label:>5} speed-up over one process on 1 CPU ({one:.2f} s): one process on 2 CPUs "
          f"{ratios['one_process_2cpu_speed_over_1cpu_wall']:.2f}x"
          + "".join(f", workers={w} {ratios[f'workers_{w}_speed_over_1cpu_wall']:.2f}x" for w in workers)
          + "".join(f", Dask {w} workers {ratios[f'dask_{w}_speed_over_1cpu_wall']:.2f}x, preloaded "
                    f"{ratios[f'dask_{w}_preloaded_speed_over_1cpu_wall']:.2f}x" for w in dask)
          + f"; same bytes: {result['same_bytes']}", flush=True)
    print(f"{label:>5} paired speed-up over one process on 1 CPU (median over rounds): "
          + ", ".join(f"{k[len('paired_'):-len('_speed_over_1cpu_wall')]} {v:.2f}x" for k, v in paired.items())
          + "; per round: " + "; ".join(f"{n} " + "/".join(f"{x:.2f}" for x in v) for n, v in per_round.items()),
          flush=True)
    print(f"{label:>5} on free cores (runs with others < {QUIET_CPUS} CPUs busy; median s): "
          + ", ".join(f"{n} {'-' if v is None else f'{v:.2f}'}" for n, v in quiet.items()), flush=True)
    return result


def file_sha256(path) -> str:
    import hashlib

    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0],
                                 formatter_class=argparse.ArgumentDefaultsHelpFormatter)
    ap.add_argument("--large", action="store_true", help="also measure 1M transitions (21,000 episodes)")
    ap.add_argument("--workers", default="2", help="comma-separated worker counts to measure (0: none)")
    ap.add_argument("--dask", default="2", help="comma-separated Dask LocalCluster worker counts (0: none)")
    ap.add_argument("--repeats", type=int, default=1,
                    help="rounds of the build, script, floor, worker and Dask cases (interleaved; medians)")
    ap.add_argument("--only-scaling", action="store_true", help="skip the script, floor and phases cases")
    ap.add_argument("--no-phases", action="store_true", help="skip the phase breakdown")
    ap.add_argument("--data", default="/tmp/goalkit-bench-grouped", help="folder for generated logs")
    ap.add_argument("--out", default=str(HERE / "results" / "grouped.json"))
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--case", help=argparse.SUPPRESS)
    ap.add_argument("--recipe", help=argparse.SUPPRESS)
    ap.add_argument("--info", help=argparse.SUPPRESS)
    ap.add_argument("--built", help=argparse.SUPPRESS)
    ap.add_argument("--cpus", type=int, default=0, help=argparse.SUPPRESS)
    ap.add_argument("--preload", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        args.workers = int(args.workers)
        child(args)
        return {}
    workers = [int(w) for w in args.workers.split(",") if int(w) > 0]
    dask = [int(w) for w in args.dask.split(",") if int(w) > 0]
    sizes = ["200k"] + (["1M"] if args.large else [])
    bytecode = compile_package()     # as an installed copy has it (see tools/bytecode.py)
    report = {"benchmark": "grouped",
              "command": "python benchmarks/bench_grouped.py " + " ".join(argv if argv is not None else sys.argv[1:]),
              "machine": {"cpus": os.cpu_count(), "python": platform.python_version()},
              "bytecode": bytecode,
              "note": "shared 2-core machine: compare ratios within one run and CPU seconds, not wall times "
                      "across runs",
              "sizes": {}}
    for label in sizes:
        report["sizes"][label] = measure(label, Path(args.data) / label, SIZES[label], workers, not args.no_phases,
                                         dask, args.repeats, args.only_scaling)
    if "1M" in report["sizes"]:
        big, small = report["sizes"]["1M"]["cases"], report["sizes"]["200k"]["cases"]
        report["peak_rss_1M_over_200k"] = {k: big[k]["peak_rss_mb"] / small[k]["peak_rss_mb"]
                                           for k in big if k in small}
    report["targets"] = {"build_speed_over_script": 1.5, "build_speed_over_floor": 0.8,
                         "peak_rss_1M_over_200k": 1.2, "workers_2_speed_over_1cpu": 1.6, "dask_2_speed_over_1cpu": 1.6}
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(report, indent=2) + "\n")
    print(f"results: {out}")
    return report


if __name__ == "__main__":
    main()
