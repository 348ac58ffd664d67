"""Pool the paired rounds of several bench_grouped.py result files: one median per size and case.

Every round of ``bench_grouped.py`` is paired with its own one-CPU runs (``per_round_speed_over_1cpu``
in each size of a result file). On a host whose speed drifts between runs, the median over all the
rounds of several runs is a steadier figure than any one run's::

    .venv/bin/python benchmarks/tools/pool_rounds.py benchmarks/results/grouped.json \\
        benchmarks/results/grouped_scaling_9.json benchmarks/results/grouped_scaling_10.json
"""

from __future__ import annotations

import json
import statistics
import sys
from pathlib import Path


def pool(paths) -> dict:
    """{size: {case: {"rounds", "median", "min", "max"}}} over the per-round speed-ups of ``paths``."""
    rounds: dict = {}
    for path in paths:
        report = json.loads(Path(path).read_text())
        for size, result in report["sizes"].items():
            for case, values in result.get("per_round_speed_over_1cpu", {}).items():
                rounds.setdefault(size, {}).setdefault(case, []).extend(values)
    return {size: {case: {"rounds": len(v), "median": statistics.median(v), "min": min(v), "max": max(v)}
                   for case, v in cases.items()}
            for size, cases in rounds.items()}


def main(argv=None) -> None:
    paths = sys.argv[1:] if argv is None else argv
    for size, cases in pool(paths).items():
        for case, f in cases.items():
            print(f"{size:>5} {case:<18} {f['rounds']:3d} rounds  median {f['median']:.2f}x  "
                  f"range {f['min']:.2f}-{f['max']:.2f}x")


if __name__ == "__main__":
    main()
