"""Benchmark: sharded builds on local worker processes and on Dask, against the single-process build.

Logs: the invented irrigation-gantry demo written by ``goalkit.demo.make_demo`` (grouped HDF5,
one group per episode, about 47 transitions per episode), 21,000 episodes by default: about one
million transitions. Recipe: the demo's own (5 goals per transition: original, final, future x2,
geometric; gzip output). Every build runs end to end in this process (planning, the log's
open-time scan, relabelling, writing), on the same logs and recipe, in one run:

* ``single``: ``build(recipe)``, one process, no shards (the baseline);
* ``workers-1``, ``workers-2``: ``build(recipe, workers=N)``, spawned local worker processes;
* ``dask-1``, ``dask-2``: ``build(recipe, client=...)`` on a ``distributed.LocalCluster`` with
  N single-threaded worker processes (cluster start-up timed separately, not included).

Reported: wall seconds and transitions per second of each, the planning time (serial, in the
coordinator), the 2-worker speed-up over 1 worker and its scaling efficiency
(``t1 / (2 * t2)``), the Dask path's overhead against the single-process build
(``t_dask1 / t_single - 1``), and the SHA-256 of every output (they must all be equal).
The machine is shared: its load average before and after each run is recorded, and the CPU
seconds of each local run (this process and its finished worker processes; Dask's worker
processes are not counted) show how many cores the build actually got.

Usage::

    .venv/bin/python benchmarks/bench_scale.py                      # ~1M transitions, ~15 minutes
    .venv/bin/python benchmarks/bench_scale.py --episodes 2000 --out /tmp/s.json

Results go to ``benchmarks/results/scale.json``.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import platform
import resource
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from goalkit.demo import make_demo  # noqa: E402
from goalkit.pipeline.build import SHARD_ROWS, build  # noqa: E402
from goalkit.pipeline.plan import make_plan  # noqa: E402
from goalkit.pipeline.recipe import load_recipe  # noqa: E402


def sha256(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 24), b""):
            h.update(block)
    return h.hexdigest()


def logs(folder: Path, episodes: int, seed: int) -> dict:
    """Demo logs in ``folder`` (reused when a previous run wrote the same size)."""
    marker = folder / "bench-logs.json"
    if marker.exists():
        info = json.loads(marker.read_text())
        if info.get("episodes") == episodes and info.get("seed") == seed:
            return info
    folder.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    info = make_demo(folder, episodes=episodes, seed=seed)
    info = {k: str(v) if isinstance(v, Path) else v for k, v in info.items()}
    info.update(seed=seed, seconds=time.perf_counter() - t0)
    marker.write_text(json.dumps(info))
    return info


def cpu_seconds() -> float:
    """User + system CPU of this process and its finished children (local workers, not Dask's)."""
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def timed(label, fn, out: Path, results: dict, transitions: int) -> None:
    out.unlink(missing_ok=True)
    c0, t0 = cpu_seconds(), time.perf_counter()
    res = fn()
    dt, cpu = time.perf_counter() - t0, cpu_seconds() - c0
    results[label] = {"seconds": dt, "transitions_per_second": transitions / dt, "sha256": sha256(out),
                      "shards": res.shards, "cpu_seconds": cpu, "cores_busy": cpu / dt,
                      "load_average_after": os.getloadavg()}
    print(f"{label:<10} {dt:8.1f} s  {transitions / dt:10,.0f} transitions/s  cpu {cpu:6.1f} s", flush=True)


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--episodes", type=int, default=21_000, help="demo episodes (about 47 transitions each)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--data", default="/tmp/goalkit-bench-scale", help="folder for the generated logs")
    ap.add_argument("--rows-per-shard", type=int, default=SHARD_ROWS)
    ap.add_argument("--skip-dask", action="store_true")
    ap.add_argument("--out", default=str(Path(__file__).with_name("results") / "scale.json"))
    args = ap.parse_args(argv)

    data = Path(args.data)
    info = logs(data, args.episodes, args.seed)
    recipe = load_recipe(info["recipe"])
    out = data / "bench-goals.h5"
    recipe = recipe.with_overrides(out=out)
    load_before = os.getloadavg()

    t0 = time.perf_counter()
    plan, _ = make_plan(recipe)
    plan_seconds = time.perf_counter() - t0
    n = plan.total_transitions
    print(f"{n:,} transitions in {len(plan.episode_ids):,} episodes; planning {plan_seconds:.1f} s", flush=True)

    rps = args.rows_per_shard
    res: dict = {}
    timed("single", lambda: build(recipe, max_rows_per_chunk=rps), out, res, n)
    timed("workers-1", lambda: build(recipe, workers=1, max_rows_per_chunk=rps), out, res, n)
    timed("workers-2", lambda: build(recipe, workers=2, max_rows_per_chunk=rps), out, res, n)
    cluster_start = {}
    if not args.skip_dask:
        from distributed import Client, LocalCluster

        for w in (1, 2):
            t0 = time.perf_counter()
            with LocalCluster(n_workers=w, threads_per_worker=1, processes=True, dashboard_address=None) as c, \
                    Client(c) as client:
                cluster_start[f"dask-{w}"] = time.perf_counter() - t0
                timed(f"dask-{w}", lambda: build(recipe, client=client, max_rows_per_chunk=rps), out, res, n)
    out.unlink(missing_ok=True)

    t = {k: v["seconds"] for k, v in res.items()}
    summary = {
        "speedup_2_over_1_workers": t["workers-1"] / t["workers-2"],
        "scaling_efficiency_2_workers": t["workers-1"] / (2 * t["workers-2"]),
        "speedup_2_workers_over_single": t["single"] / t["workers-2"],
        "shard_overhead_1_worker_vs_single": t["workers-1"] / t["single"] - 1,
        "planning_share_of_single": plan_seconds / t["single"],
        "all_outputs_identical": len({v["sha256"] for v in res.values()}) == 1,
    }
    if "dask-1" in t:
        summary["dask_overhead_1_worker_vs_single"] = t["dask-1"] / t["single"] - 1
        summary["speedup_dask_2_over_single"] = t["single"] / t["dask-2"]
    report = {
        "benchmark": "scale",
        "command": "python benchmarks/bench_scale.py " + " ".join(argv if argv is not None else sys.argv[1:]),
        "logs": {"generator": "goalkit.demo.make_demo", "episodes": args.episodes, "seed": args.seed,
                 "transitions": n, "rows": n * recipe.mixture.goals_per_transition,
                 "generation_seconds": info.get("seconds")},
        "rows_per_shard": rps,
        "shards": res["workers-2"]["shards"]["total"],
        "planning_seconds": plan_seconds,
        "runs": res,
        "dask_cluster_start_seconds": cluster_start,
        "summary": summary,
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(), "platform": platform.platform(),
                    "load_average_before": load_before, "load_average_after": os.getloadavg()},
        "when": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
    }
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(report, indent=1, sort_keys=True))
    print(json.dumps(summary, indent=1))
    return report


if __name__ == "__main__":
    main()
