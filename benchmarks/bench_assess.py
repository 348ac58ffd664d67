"""Benchmark: goalkit's own overhead per row in ``assess`` on a 100k-pair suite.

A small demo set is built (``goalkit demo`` scenario, invented data) and a suite of its
validation split is drawn; its rows are then repeated to ``--rows`` pairs (episode ids kept, so
the bootstrap still resamples the set's held-out episodes) and written as a suite carrying the
set's checksum. ``assess`` scores one trivial policy (zeros) and one trivial value function
(a column of the goal) with 1000 episode resamples. Measured in the same run:

* the floor: calling the two trivial callables on the same batches, nothing else;
* ``assess`` end to end (read and check the suite and the set's checksum, import, call, check
  every result, score, bootstrap), and the time spent inside the callables;
* the same with ``resamples=0`` (no intervals), to show what the bootstrap costs.

goalkit's overhead per row = (assess time - time inside the callables) / (rows x callables).
Medians of ``--repeats`` runs. Results go to ``benchmarks/results/assess.json``.

Usage::

    .venv/bin/python benchmarks/bench_assess.py                 # 100k pairs, ~ a minute
    .venv/bin/python benchmarks/bench_assess.py --rows 20000 --out /tmp/a.json
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from goalkit.demo.files import make_demo  # noqa: E402
from goalkit.pipeline.build import build  # noqa: E402
from goalkit.pipeline.recipe import load_recipe  # noqa: E402
from goalkit.scoring.run import assess_suite  # noqa: E402
from goalkit.suites.fileformat import COLUMNS, read_suite, write_suite  # noqa: E402
from goalkit.suites.make import make_suite  # noqa: E402

TRIVIAL = '''
import numpy as np

def policy(batch):
    return np.zeros((len(batch["goal"]), 3), dtype=np.float32)

def value(batch):
    return batch["goal"][:, 0]
'''


def prepare(folder: Path, rows: int) -> tuple[Path, Path]:
    demo = make_demo(folder / "demo", episodes=300, seed=5)
    result = build(load_recipe(demo["recipe"]))
    small = make_suite(result.path, folder / "small.h5", per_cell=100000, seed=0)
    s = read_suite(small.path)
    reps = -(-rows // len(s))
    cols = {k: np.concatenate([v] * reps)[:rows] for k, v in s.columns.items()}
    order = np.lexsort((cols["step"], cols["episode"]))
    cols = {k: v[order] for k, v in cols.items()}
    big = folder / "suite-big.h5"
    write_suite(big, {k: cols[k] for k in COLUMNS}, {"seed": 0, "set_path": str(result.path),
                "set_checksum": s.set_checksum, "logs_checksum": s.logs_checksum, "strata": s.strata,
                "counts": {**s.counts, "rows": rows}})
    (folder / "trivialck.py").write_text(TRIVIAL)
    return result.path, big


def floor(suite: Path, batch: int, folder: Path) -> float:
    sys.path.insert(0, str(folder))
    import trivialck

    s = read_suite(suite).columns
    t0 = time.perf_counter()
    for a in range(0, len(s["horizon"]), batch):
        b = {"observation": s["state"][a:a + batch], "goal": s["goal"][a:a + batch]}
        trivialck.policy(b)
        trivialck.value(b)
    return time.perf_counter() - t0


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--batch-size", type=int, default=1024)
    ap.add_argument("--resamples", type=int, default=1000)
    ap.add_argument("--out", default=str(Path(__file__).resolve().parent / "results" / "assess.json"))
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="bench-assess-") as tmp:
        folder = Path(tmp)
        dataset, suite = prepare(folder, args.rows)
        runs = {"with_intervals": [], "no_intervals": []}
        callable_s = {"with_intervals": [], "no_intervals": []}
        floors = []
        for _ in range(args.repeats):
            floors.append(floor(suite, args.batch_size, folder))
            for name, b in (("with_intervals", args.resamples), ("no_intervals", 0)):
                res = assess_suite(dataset, suite, policies=["trivialck:policy"], values=["trivialck:value"],
                                   import_path=folder, batch_size=args.batch_size, resamples=b, seed=0)
                runs[name].append(res.timing["total_s"])
                callable_s[name].append(res.timing["callable_s"])
        episodes = int(np.unique(read_suite(suite).columns["episode"]).size)
    calls = 2
    out = {"rows": args.rows, "episodes": episodes, "batch_size": args.batch_size, "resamples": args.resamples,
           "repeats": args.repeats, "machine": {"cpus": os.cpu_count(), "python": platform.python_version()},
           "floor_callables_only_s": statistics.median(floors)}
    for name in runs:
        total, inside = statistics.median(runs[name]), statistics.median(callable_s[name])
        out[name] = {"assess_s": total, "inside_callables_s": inside, "overhead_s": total - inside,
                     "overhead_per_row_us": 1e6 * (total - inside) / (args.rows * calls)}
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(out, indent=2) + "\n")
    print(json.dumps(out, indent=2))
    return out


if __name__ == "__main__":
    main()
