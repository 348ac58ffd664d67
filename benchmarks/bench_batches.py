"""Benchmark: one shuffled epoch of batches from a built set, against an in-memory numpy baseline.

On a demo set of about 200k transitions (``goalkit demo`` + build, 5 goals a transition, so
about 1M rows), measured in one run on the same file, interleaved, medians of ``--repeats``:

* baseline: read the same columns of the training split into memory with h5py (``ds[:]``) and
  index a numpy permutation, batch by batch;
* ``batches(shuffle=True)`` with the default memory budget (the split fits: full permutation);
  target at least 1.0x the baseline;
* ``batches(shuffle=True)`` with a memory budget of a quarter of the columns' bytes (the set is
  four times the budget: pools of mirrored pairs of stored chunks); target at least 0.5x the baseline;
* for reference, ``shuffle="passes"`` with the same quarter budget (the exact permutation, every
  chunk decoded once per pass);
* sharded: ``--shards`` shards (data-loader workers or processes; 4 by default) each read in turn
  with ``shuffle="pooled"``, once with the quarter budget each and once with the quarter budget
  split among them, so a shard holds only a few stored chunks when they are 65536 rows long (its
  pools then take a mirrored share of every one of its chunks).
  Its speed is that of reading all shards one after the other; its quality is measured per shard
  (distinct episodes of a shard's batches against independent draws over the whole split, and
  the mean over shards of each shard's lag-1 correlation).

Quality of each mode, against independent sampling: distinct source episodes in a batch (mean
over the epoch's full batches; the independent expectation is the hypergeometric closed form
sum_e 1 - C(N - n_e, B) / C(N, B)) and the lag-1 correlation of consecutive batches' mean row
position (0 for independent draws, up to noise of about 1 / sqrt(batches)).

Usage::

    .venv/bin/python benchmarks/bench_batches.py                   # ~200k transitions, a few minutes
    .venv/bin/python benchmarks/bench_batches.py --episodes 400 --repeats 1 --out /tmp/b.json

Results go to ``benchmarks/results/batches.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import goalkit  # noqa: E402

HERE = Path(__file__).resolve().parent
COLUMNS = ["observation", "action", "next_observation", "goal", "reward", "terminal"]


def make_set(directory: Path, episodes: int, chunk_rows: int) -> Path:
    goalkit.make_demo(directory, episodes=episodes, seed=0)
    recipe = directory / "gantry-recipe.toml"
    recipe.write_text(recipe.read_text().replace("chunk_rows = 65536", f"chunk_rows = {chunk_rows}"))
    return goalkit.build(recipe).path


def baseline_epoch(path: Path, batch: int, seed: int) -> float:
    t0 = time.perf_counter()
    with h5py.File(path, "r") as f:
        data = {c: f["train"][c][:] for c in COLUMNS}
    n = len(data["reward"])
    perm = np.random.default_rng(seed).permutation(n)
    for b in range(0, n, batch):
        idx = perm[b:b + batch]
        out = {k: v[idx] for k, v in data.items()}
    assert len(out["reward"]) > 0
    return time.perf_counter() - t0


def goalkit_epoch(path: Path, batch: int, seed: int, **kw) -> float:
    t0 = time.perf_counter()
    rows = 0
    with goalkit.open_set(path) as gs:
        for out in gs.batches("train", batch, COLUMNS, seed=seed, **kw):
            rows += len(out["reward"])
    assert rows > 0
    return time.perf_counter() - t0


def sharded_epoch(path: Path, batch: int, seed: int, shards: int, **kw) -> float:
    return sum(goalkit_epoch(path, batch, seed, shard=(i, shards), **kw) for i in range(shards))


def quality(path: Path, batch: int, shards: int = 1, **kw) -> dict:
    distinct, lags, batches = [], [], 0
    with goalkit.open_set(path) as gs:
        n = gs.rows("train")
        sizes = np.unique(gs.read("train", ["source_episode"])["source_episode"], return_counts=True)[1]
        for index in range(shards):
            means = []
            for b in gs.batches("train", batch, ["source_episode"], row_numbers=True, drop_last=True,
                                shard=(index, shards), **kw):
                distinct.append(len(np.unique(b["source_episode"])))
                means.append(b["row"].mean() / n)
            means = np.asarray(means)
            lags.append(float(np.corrcoef(means[:-1], means[1:])[0, 1]))
            batches += len(means)
    independent = float(np.sum(1.0 - stats.hypergeom.pmf(0, n, sizes, batch)))
    return {"distinct_episodes_per_batch": float(np.mean(distinct)), "independent_expectation": independent,
            "ratio": float(np.mean(distinct)) / independent,
            "lag1_correlation_of_batch_mean_position": float(np.mean(lags)),
            "lag1_per_shard": lags, "shards": shards,
            "batches": batches, "noise_1_over_sqrt_batches": 1 / np.sqrt(batches)}


def run(path: Path, batch: int, repeats: int, shards: int = 4) -> dict:
    with goalkit.open_set(path) as gs:
        n = gs.rows("train")
        col_bytes = sum(gs.file["train"][c].dtype.itemsize * int(np.prod(gs.file["train"][c].shape[1:]))
                        for c in COLUMNS) * n
        chunk = gs.file["train"]["observation"].chunks[0]
        episodes = len(np.unique(gs.read("train", ["source_episode"])["source_episode"]))
    quarter = col_bytes // 4
    modes = {"baseline": lambda s: baseline_epoch(path, batch, s),
             "fits": lambda s: goalkit_epoch(path, batch, s, shuffle=True),
             "streaming_quarter_budget": lambda s: goalkit_epoch(path, batch, s, shuffle=True, memory_budget=quarter),
             "passes_quarter_budget": lambda s: goalkit_epoch(path, batch, s, shuffle="passes", memory_budget=quarter),
             "sharded_quarter_budget_each": lambda s: sharded_epoch(path, batch, s, shards, shuffle="pooled",
                                                                    memory_budget=quarter),
             "sharded_quarter_budget_split": lambda s: sharded_epoch(path, batch, s, shards, shuffle="pooled",
                                                                     memory_budget=quarter // shards)}
    for f in modes.values():  # warm the page cache and imports
        f(0)
    times = {k: [] for k in modes}
    for r in range(repeats):
        for k, f in modes.items():
            times[k].append(f(r + 1))
    med = {k: statistics.median(v) for k, v in times.items()}
    budget_rows = quarter // (col_bytes // n)
    return {
        "train_rows": n, "train_episodes": episodes, "chunk_rows": int(chunk), "batch_size": batch,
        "columns": COLUMNS, "column_bytes": int(col_bytes), "quarter_budget_bytes": int(quarter),
        "seconds": {k: {"median": med[k], "all": times[k]} for k in modes},
        "speed_over_baseline": {k: med["baseline"] / med[k] for k in modes if k != "baseline"},
        "quality": {
            "fits (full permutation)": quality(path, batch, shuffle=True),
            "streaming (pooled, quarter budget)": quality(path, batch, shuffle=True,
                                                          memory_budget=budget_rows * 8),
            "passes (quarter budget)": quality(path, batch, shuffle="passes", memory_budget=budget_rows * 8),
            f"sharded ({shards} shards, pooled, quarter budget each)": quality(
                path, batch, shards, shuffle="pooled", memory_budget=budget_rows * 8),
            f"sharded ({shards} shards, pooled, quarter budget split among them)": quality(
                path, batch, shards, shuffle="pooled", memory_budget=budget_rows // shards * 8),
        },
    }


class _Help(argparse.RawDescriptionHelpFormatter, argparse.ArgumentDefaultsHelpFormatter):
    """The module docstring as written, and every option's default."""


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=_Help)
    p.add_argument("--episodes", type=int, default=4200, help="demo episodes (4200: about 200k transitions)")
    p.add_argument("--chunk-rows", default="65536,8192", help="stored chunk lengths to measure, comma-separated")
    p.add_argument("--batch-size", type=int, default=256, help="rows a batch")
    p.add_argument("--repeats", type=int, default=3, help="timed epochs of each mode (medians reported)")
    p.add_argument("--shards", type=int, default=4, help="shards of the sharded case (read one after the other)")
    p.add_argument("--out", default=str(HERE / "results" / "batches.json"), help="results file (JSON)")
    args = p.parse_args(argv)
    results = {"machine": {"cpus": os.cpu_count()}, "episodes": args.episodes, "sets": {}}
    with tempfile.TemporaryDirectory() as tmp:
        for chunk in [int(c) for c in args.chunk_rows.split(",")]:
            d = Path(tmp) / f"c{chunk}"
            path = make_set(d, args.episodes, chunk)
            row = run(path, args.batch_size, args.repeats, args.shards)
            results["sets"][f"chunk_rows={chunk}"] = row
            print(json.dumps({chunk: {"speed": row["speed_over_baseline"],
                                      "quality": {k: round(v["ratio"], 3) for k, v in row["quality"].items()}}}),
                  flush=True)
    sets = results["sets"].values()
    results["targets"] = {
        "fits>=1.0x": min(r["speed_over_baseline"]["fits"] for r in sets) >= 1.0,
        "streaming_quarter_budget>=0.5x": min(r["speed_over_baseline"]["streaming_quarter_budget"] for r in sets) >= 0.5,
    }
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(results, indent=2, sort_keys=True))
    print(json.dumps(results["targets"]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
