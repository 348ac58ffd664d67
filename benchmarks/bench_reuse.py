"""Benchmark: rebuilding a growing archive with --keep-work against a fresh build of it.

Logs: the invented irrigation-gantry demo (``goalkit.demo.make_demo``), one grouped HDF5 file per
"day" (each its own seed), read by the demo's recipe with ``[logs] path`` a glob of the days.
In one run, on the same machine and files:

* ``fresh``: a build of every day without ``keep_work`` (the baseline);
* ``first``: a ``keep_work`` build of all days but the last (everything relabelled, rows kept);
* ``grown``: the last day added, a ``keep_work`` rebuild (only its episodes relabelled).

Reported: seconds of each (median of ``--repeats`` runs, after one untimed warm-up build),
``grown / fresh`` (the share of a fresh build's time an append costs; the target is well under
1 with many days), ``first`` against ``fresh`` scaled by its share of the files (the cost of
keeping the rows), the work folder's bytes against the set's, and whether ``grown`` and
``fresh`` have the same SHA-256 (they must).

Usage::

    .venv/bin/python benchmarks/bench_reuse.py                       # 8 days x 250 episodes
    .venv/bin/python benchmarks/bench_reuse.py --days 4 --episodes 100 --out /tmp/r.json

Results go to ``benchmarks/results/reuse.json``.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import goalkit  # noqa: E402
from goalkit.demo import make_demo  # noqa: E402


def sha256(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0],
                                 formatter_class=argparse.ArgumentDefaultsHelpFormatter)
    ap.add_argument("--days", type=int, default=8, help="log files (the last one is appended)")
    ap.add_argument("--episodes", type=int, default=250, help="demo episodes per file (~47 transitions each)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--out", default=str(Path(__file__).with_name("results") / "reuse.json"))
    args = ap.parse_args(argv)

    root = Path(tempfile.mkdtemp(prefix="goalkit-bench-reuse-"))
    try:
        days = []
        for d in range(args.days):
            info = make_demo(root / f"gen{d}", episodes=args.episodes, seed=100 + d)
            days.append(Path(info["logs"]))
        layout = Path(info["layout"])
        text = Path(info["recipe"]).read_text()
        (root / "layout.toml").write_text(layout.read_text())
        logs = root / "logs"
        logs.mkdir()
        text = text.replace(f'path = "{days[0].name}"', 'path = "logs/day-*.h5"', 1)
        text = text.replace(f'layout = "{layout.name}"', 'layout = "layout.toml"', 1)
        recipe = root / "recipe.toml"
        recipe.write_text(text)
        out = root / goalkit.load_recipe(recipe).output.path.name
        work = out.with_name(f".{out.name}.work")

        def place(n):
            for p in logs.iterdir():
                p.unlink()
            for d in range(n):
                shutil.copyfile(days[d], logs / f"day-{d:02d}.h5")

        place(args.days)
        goalkit.build(recipe, replace=True, card=False)          # warm-up (imports, caches)
        times = {"fresh": [], "first": [], "grown": []}
        result = {}
        for _ in range(args.repeats):
            place(args.days)
            shutil.rmtree(work, ignore_errors=True)
            t0 = time.perf_counter()
            fresh = goalkit.build(recipe, replace=True, card=False)
            times["fresh"].append(time.perf_counter() - t0)
            fresh_sha, set_bytes = sha256(fresh.path), fresh.file_bytes
            place(args.days - 1)
            t0 = time.perf_counter()
            goalkit.build(recipe, replace=True, card=False, keep_work=True)
            times["first"].append(time.perf_counter() - t0)
            place(args.days)
            t0 = time.perf_counter()
            grown = goalkit.build(recipe, replace=True, card=False, keep_work=True)
            times["grown"].append(time.perf_counter() - t0)
            result = {"identical": sha256(grown.path) == fresh_sha, "reuse": grown.reuse, "set_bytes": set_bytes}
            print({k: round(v[-1], 2) for k, v in times.items()}, grown.reuse["episodes"], flush=True)
        med = {k: statistics.median(v) for k, v in times.items()}
        share = (args.days - 1) / args.days
        report = {
            "days": args.days, "episodes_per_day": args.episodes, "repeats": args.repeats,
            "seconds": times, "median_seconds": med,
            "grown_over_fresh": med["grown"] / med["fresh"],
            "first_over_fresh_share": med["first"] / (med["fresh"] * share),
            "work_bytes_over_set_bytes": result["reuse"]["bytes"] / result["set_bytes"],
            "identical": result["identical"], "reuse": result["reuse"], "load_average": os.getloadavg(),
        }
        report["reuse"] = {k: v for k, v in report["reuse"].items() if k != "folder"}
        print(json.dumps({k: report[k] for k in ("median_seconds", "grown_over_fresh", "first_over_fresh_share",
                                                 "work_bytes_over_set_bytes", "identical")}, indent=1))
        Path(args.out).parent.mkdir(parents=True, exist_ok=True)
        Path(args.out).write_text(json.dumps(report, indent=1))
        return report
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
