"""Benchmark: ``goalkit info`` against ``goalkit verify`` on the same large set.

``info`` reads only a set's stored attributes; ``verify`` re-derives every row from the logs.
The target is info under 1 % of verify's time on a 10M-row set. Logs: the invented
irrigation-gantry demo (``goalkit.demo.make_demo``, grouped HDF5, about 47 transitions per
episode, 5 goal rows per transition with the demo recipe), so 10M rows need about 42,500
episodes. The set is built once (its time and the card's are reported too); then, in this run:

* ``verify``: ``goalkit.verify(path)`` in this process (the baseline; ``--verify-repeats``
  runs, default 1: it takes minutes);
* ``info (library)``: ``goalkit.info(path)`` in this process, median of 7 runs;
* ``info (command)``: ``goalkit info PATH`` as a fresh process (Python start-up and imports
  included), median of 5 runs.

Reported: seconds of each, the ratios info / verify, rows, file size, the machine's load.

Usage::

    .venv/bin/python benchmarks/bench_info.py                         # 10M rows (~15 minutes)
    .venv/bin/python benchmarks/bench_info.py --rows 1000000 --out /tmp/info.json

Results go to ``benchmarks/results/info.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import goalkit  # noqa: E402
from goalkit.demo import make_demo  # noqa: E402

ROWS_PER_EPISODE = 235  # about 47 transitions x 5 goal rows, with the demo recipe


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, default=10_000_000, help="target rows of the set")
    ap.add_argument("--folder", type=Path, default=Path("/tmp/goalkit-bench-info"),
                    help="where the logs and the set are written (reused when the size matches)")
    ap.add_argument("--verify-repeats", type=int, default=1)
    ap.add_argument("--out", type=Path, default=Path(__file__).parent / "results" / "info.json")
    args = ap.parse_args(argv)

    episodes = max(1, args.rows // ROWS_PER_EPISODE)
    folder = args.folder
    marker = folder / "bench-info.json"
    record = {"benchmark": "info", "command": "python benchmarks/bench_info.py " + " ".join(argv or sys.argv[1:]),
              "machine": {"cpus": os.cpu_count(), "platform": platform.platform(),
                          "python": platform.python_version(), "load_average_before": list(os.getloadavg())}}
    previous = json.loads(marker.read_text()) if marker.is_file() else {}
    path = folder / "gantry-goals.h5"
    if previous.get("episodes") == episodes and path.is_file():
        record["logs"], record["build"] = previous["logs"], previous["build"]
    else:
        if folder.exists():
            shutil.rmtree(folder)
        folder.mkdir(parents=True)
        t = time.perf_counter()
        make_demo(folder, episodes=episodes, seed=0)
        record["logs"] = {"generator": "goalkit.demo.make_demo", "episodes": episodes, "seed": 0,
                          "generation_seconds": time.perf_counter() - t}
        t = time.perf_counter()
        result = goalkit.build(folder / "gantry-recipe.toml")
        record["build"] = {"seconds_with_card": time.perf_counter() - t, "build_seconds": result.seconds,
                           "card": [str(p) for p in result.card]}
        marker.write_text(json.dumps({"episodes": episodes, "logs": record["logs"], "build": record["build"]}))
    facts = goalkit.info(path)
    record["set"] = {"rows": facts["rows"], "total_rows": sum(facts["rows"].values()),
                     "file_bytes": facts["file_bytes"], "mode": facts["mode"]}

    lib = []
    for _ in range(7):
        t = time.perf_counter()
        goalkit.info(path)
        lib.append(time.perf_counter() - t)
    cli = []
    exe = [sys.executable, "-m", "goalkit.cli", "info", str(path)]
    for _ in range(5):
        t = time.perf_counter()
        subprocess.run(exe, check=True, capture_output=True)
        cli.append(time.perf_counter() - t)
    ver = []
    for _ in range(args.verify_repeats):
        t = time.perf_counter()
        report = goalkit.verify(path)
        ver.append(time.perf_counter() - t)
        if not report.ok:
            print("verify found the set inconsistent:", report.failures[:3], file=sys.stderr)
            return 1
    v = statistics.median(ver)
    record["seconds"] = {"verify": ver, "info_library": lib, "info_command": cli}
    record["median_seconds"] = {"verify": v, "info_library": statistics.median(lib),
                                "info_command": statistics.median(cli)}
    record["ratio_to_verify"] = {"info_library": statistics.median(lib) / v, "info_command": statistics.median(cli) / v}
    record["target"] = "info under 1% of verify (ratio < 0.01)"
    record["machine"]["load_average_after"] = list(os.getloadavg())
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(record, indent=1, sort_keys=True) + "\n")
    print(json.dumps({k: record[k] for k in ("set", "median_seconds", "ratio_to_verify")}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
