"""verify, scan and tune on logs shaped as users keep them, against the build and a plain read.

    .venv/bin/python benchmarks/bench_grouped_tools.py              # 200k transitions (~1 min)
    .venv/bin/python benchmarks/bench_grouped_tools.py --repeats 3  # medians of 3 rounds

Logs and recipe: as in bench_grouped.py (``goalkit.demo.make_demo``, 4,250 episodes, about
200k transitions, one HDF5 group per episode, seven gzip datasets each; the demo recipe with
5 goals per transition and a gzip set).

Cases, each a fresh process running the command line in process (``goalkit.cli.main``), in one
run and one round after the other:

* ``build``: ``goalkit build RECIPE --quiet --replace`` (the set verify then checks; the card
  is written as the command does);
* ``verify``: ``goalkit verify SET --quiet`` (replay and audit: every check);
* ``scan``: ``goalkit scan LOGS --layout LAYOUT --json``;
* ``tune``: ``goalkit tune RECIPE --from-success --resamples 1000 --quiet`` (its default sample
  of 200,000 transitions, so all of these logs);
* ``read``: the plain h5py read of the same datasets, the floor of scan and tune: every episode
  group's seven datasets read whole (``group[key][()]``) and its ``task`` attribute;
* ``heads-build`` and ``heads-verify`` (only when named in ``--cases``): the same logs built as a
  set with goal heads (:data:`HEADS`: one goal per transition plus a value, a policy and a
  subgoal head, written as ``bench-heads-recipe.toml`` beside the logs), and its verify. Their
  ratios: heads build / build (what three heads cost over the demo's five goals per
  transition) and heads verify / heads build; peak RSS shows whether the heads' audit stays
  bounded (run with ``--episodes 21000`` for 1M transitions).

Reported: wall and CPU seconds per case (CPU: user + system of the process and its finished
children; the machine has 2 cores, shared), peak RSS, the load average before and after,
``others_cpus_busy`` per case (the CPUs the rest of the machine kept busy while the case ran:
``/proc/stat`` busy time of all CPUs minus the case's whole process tree, per second of the
case; near 0 means the cores were the case's), and the ratios of issue 14: verify / build,
scan / read, tune / read (by wall, and by CPU), the median over rounds. Targets: verify <= 1.0x the build, scan <= 1.1x and tune <= 1.5x the read.
Results: ``benchmarks/results/grouped_tools.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import statistics
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

from bench_grouped import cpu_seconds, logs, machine_cpu_seconds  # noqa: E402  (the same demo logs, reused by size)

EPISODES = 4_250
KEYS = ("head", "head_velocity", "trays", "action", "reward", "success", "task_goal")
TARGETS = {"verify_over_build": 1.0, "scan_over_read": 1.1, "tune_over_read": 1.5}


def read_case(logs: str) -> dict:
    """The plain h5py read of every dataset of every episode group."""
    import h5py

    values = 0
    with h5py.File(logs, "r") as f:
        top = f["bench"]
        for name in top:
            g = top[name]
            for key in KEYS:
                values += g[key][()].size
            g.attrs["task"]
    return {"values_read": values}


def cli_case(argv: list) -> dict:
    from goalkit.cli import main

    try:
        main(argv, prog_name="goalkit")
        code = 0
    except SystemExit as exc:
        code = exc.code or 0
    return {"exit_status": code}


#: The goal heads of the ``heads-*`` cases: a value head and a policy head drawing their goals
#: as value and policy heads of current offline goal-conditioned methods do (the current state,
#: a geometric offset, a random state; shares 0.2 / 0.5 / 0.3 from memory of common practice),
#: and a subgoal head 25 steps ahead.
HEADS = """
[heads.value]
weights = {current = 0.2, geometric = 0.5, random = 0.3}
gamma = 0.99

[heads.policy]
weights = {geometric = 1}
gamma = 0.99
past_end = "renormalise"

[heads.subgoal]
weights = {subgoal = 1}
steps = 25
"""


def heads_recipe(recipe: str) -> str:
    """Write the demo recipe with goal heads beside it (one goal per transition, three heads)."""
    path = Path(recipe).with_name("bench-heads-recipe.toml")
    text = Path(recipe).read_text().replace("goals_per_transition = 5", "goals_per_transition = 1")
    text = text.replace('compression = "gzip"', 'compression = "gzip"\ngoals = "heads"')
    path.write_text(text + HEADS)
    return str(path)


def child(args) -> None:
    info = json.loads(Path(args.info).read_text())
    folder = Path(info["recipe"]).parent
    built = str(folder / "bench-tools-goals.h5")
    heads_built = str(folder / "bench-heads-goals.h5")
    c0, t0 = cpu_seconds(), time.perf_counter()
    if args.case == "read":
        res = read_case(info["logs"])
    else:
        argv = {"build": ["build", info["recipe"], "--out", built, "--quiet", "--replace"],
                "verify": ["verify", built, "--quiet"],
                "scan": ["scan", info["logs"], "--layout", info["layout"], "--json"],
                "tune": ["tune", info["recipe"], "--from-success", "--quiet"],
                "heads-build": ["build", heads_recipe(info["recipe"]), "--out", heads_built, "--quiet", "--replace"],
                "heads-verify": ["verify", heads_built, "--quiet"]}[args.case]
        out = open(os.devnull, "w")
        saved, sys.stdout = sys.stdout, out
        try:
            res = cli_case(argv)
        finally:
            sys.stdout = saved
    # this image's own peak (VmHWM): ru_maxrss would carry the benchmark parent's (tools/peakrss.py)
    res.update(seconds=time.perf_counter() - t0, cpu_seconds=cpu_seconds() - c0, peak_rss_mb=image_peak_rss_mb())
    print(json.dumps(res))


def run(case: str, marker: str) -> dict:
    before, busy0, t0 = resource.getrusage(resource.RUSAGE_CHILDREN), machine_cpu_seconds(), time.perf_counter()
    proc = subprocess.run([sys.executable, __file__, "--child", "--case", case, "--info", marker],
                          capture_output=True, text=True, cwd=str(ROOT), env={**os.environ, "PYTHONPATH": str(ROOT)})
    wall, busy1, after = time.perf_counter() - t0, machine_cpu_seconds(), resource.getrusage(resource.RUSAGE_CHILDREN)
    own = (after.ru_utime + after.ru_stime) - (before.ru_utime + before.ru_stime)   # the case's process tree
    if proc.returncode:
        raise RuntimeError(f"benchmark case {case} failed:\n{proc.stderr[-4000:]}")
    res = json.loads(proc.stdout.strip().splitlines()[-1])
    if res.get("exit_status", 0) != 0:
        raise RuntimeError(f"benchmark case {case} exited with {res['exit_status']}:\n{proc.stderr[-4000:]}")
    res["others_cpus_busy"] = max(0.0, sum(busy1) - sum(busy0) - own) / wall
    return res


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0],
                                 formatter_class=argparse.ArgumentDefaultsHelpFormatter)
    ap.add_argument("--episodes", type=int, default=EPISODES, help="demo episodes (about 47 transitions each)")
    ap.add_argument("--repeats", type=int, default=1, help="rounds of every case; ratios are medians over rounds")
    ap.add_argument("--cases", default="read,build,verify,scan,tune", help="comma-separated cases to run")
    ap.add_argument("--data", default="/tmp/goalkit-bench-grouped/200k", help="folder for generated logs")
    ap.add_argument("--out", default=str(HERE / "results" / "grouped_tools.json"))
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--case", help=argparse.SUPPRESS)
    ap.add_argument("--info", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(args)
        return {}
    bytecode = compile_package()     # as an installed copy has it (see tools/bytecode.py)
    info = logs(Path(args.data), args.episodes)
    marker = str(Path(args.data) / "bench-logs.json")
    cases = [c for c in args.cases.split(",") if c]
    if "verify" in cases and "build" not in cases:
        cases.insert(0, "build")
    if "heads-verify" in cases and "heads-build" not in cases:
        cases.insert(cases.index("heads-verify"), "heads-build")
    rounds = []
    load_before = os.getloadavg()
    for r in range(args.repeats):
        got = {}
        for case in cases:
            got[case] = run(case, marker)
            g = got[case]
            print(f"round {r + 1} {case:<7} wall {g['seconds']:6.2f} s  cpu {g['cpu_seconds']:6.2f} s  "
                  f"peak RSS {g['peak_rss_mb']:5.0f} MiB  load {os.getloadavg()[0]:.2f}  "
                  f"others busy {g['others_cpus_busy']:.2f} CPUs", flush=True)
        rounds.append(got)
    for name in ("bench-tools-goals.h5", "bench-heads-goals.h5"):
        Path(info["recipe"]).parent.joinpath(name).unlink(missing_ok=True)
    ratios = {}
    for name, (num, den) in {"verify_over_build": ("verify", "build"), "scan_over_read": ("scan", "read"),
                             "tune_over_read": ("tune", "read"), "heads_build_over_build": ("heads-build", "build"),
                             "heads_verify_over_heads_build": ("heads-verify", "heads-build")}.items():
        if num in cases and den in cases:
            for what in ("seconds", "cpu_seconds"):
                key = name + ("_wall" if what == "seconds" else "_cpu")
                ratios[key] = statistics.median(g[num][what] / g[den][what] for g in rounds)
    report = {"benchmark": "grouped_tools",
              "command": "python benchmarks/bench_grouped_tools.py " + " ".join(argv if argv is not None
                                                                              else sys.argv[1:]),
              "machine": {"cpus": os.cpu_count(), "python": platform.python_version()},
              "bytecode": bytecode,
              "episodes": args.episodes, "transitions": info["steps"],
              "load_average_before": load_before, "load_average_after": os.getloadavg(),
              "rounds": rounds, "ratios": ratios, "targets": TARGETS,
              "note": "shared 2-core machine: compare ratios within one run and CPU seconds"}
    for k, v in ratios.items():
        print(f"{k:<24} {v:5.2f}x")
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(report, indent=2) + "\n")
    print(f"results: {out}")
    return report


if __name__ == "__main__":
    main()
