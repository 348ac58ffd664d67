"""Benchmark: graph distances (goalkit.goals.stategraph) on 1M logged states against plain scipy.

Invented irrigation-gantry logs: the nozzle head's cell on a bench of ``--cells`` x ``--cells``
cells, one cell per step (random walks, 200 states per episode), goal = the head's cell; states
of different episodes in the same cell are joined (join radius 0, faiss index as in a build).
Measured in one run on the same graph:

* ``sample``: the distances from 2,000 random states to each of ``--goals`` sampled goal states,
  by :meth:`StateGraph.distances` (backward breadth-first search bounded by the horizon, and
  unbounded) and by plain ``scipy.sparse.csgraph.shortest_path(unweighted=True, indices=goals)``
  on the reversed graph (a dense row of N distances per goal). Checks that both agree.
* ``rows``: future-goal rows (source s_t+1, goal s_j of the same episode, ``j`` uniform on
  ``t+1..T``) for a sample of transitions: time per million rows at the bounded horizon.
* peak memory of each part with tracemalloc (numpy's allocations are traced), at two log
  sizes (``--sizes``), to show the search's memory does not grow with the logs while the dense
  baseline's does.

Usage::

    .venv/bin/python benchmarks/bench_graph.py                       # 250k and 1M states
    .venv/bin/python benchmarks/bench_graph.py --sizes 100000 --out /tmp/g.json

Results go to ``benchmarks/results/graph.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import shortest_path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from goalkit.goals.stategraph import UNREACHABLE, GraphSettings, StateGraph  # noqa: E402

STATES_PER_EPISODE = 200
MOVES = np.array([[1, 0], [-1, 0], [0, 1], [0, -1]])


def gantry_walks(states: int, cells: int, seed: int = 0):
    """Head cells of random walks (one cell per step, clipped at the bench's edges)."""
    rng = np.random.default_rng(seed)
    episodes = states // STATES_PER_EPISODE
    start = rng.integers(0, cells, (episodes, 1, 2))
    steps = MOVES[rng.integers(0, 4, (episodes, STATES_PER_EPISODE - 1))]
    pos = np.concatenate([start, steps], axis=1).cumsum(axis=1)
    pos = np.abs(pos)  # reflect at 0 and at the far edge: still one cell per step
    pos = np.where(pos >= cells, 2 * (cells - 1) - pos, pos)
    offsets = np.arange(episodes + 1, dtype=np.int64) * (STATES_PER_EPISODE - 1)
    return pos.reshape(-1, 2).astype(np.float32), offsets


def measure(fn):
    tracemalloc.start()
    t0 = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return out, dt, peak / 1e6


def run_size(states: int, cells: int, goals: int, horizon: int, rows: int, batch: int) -> dict:
    x, offsets = gantry_walks(states, cells)
    settings = GraphSettings(join_radius=0.0, join_neighbours=8, horizon=horizon, batch=batch)
    graph, t_build, m_build = measure(lambda: StateGraph.from_logs(x, offsets, settings))
    n = graph.n_states_
    rng = np.random.default_rng(1)
    targets = rng.choice(n, goals, replace=False)
    sources = rng.integers(0, n, (goals, 2000))
    src = sources.ravel()
    tgt = np.repeat(targets, 2000)
    bounded, t_ours, m_ours = measure(lambda: graph.distances(src, tgt))
    unbounded_graph = StateGraph(n, *_edges(graph), n_joins=graph.n_joins_, horizon=None, batch=batch)
    exact, t_full, m_full = measure(lambda: unbounded_graph.distances(src, tgt))
    rev = graph.csr().T.tocsr()

    def plain():
        d = shortest_path(rev, method="D", directed=True, unweighted=True, indices=targets)
        return d[np.arange(goals)[:, None], sources].ravel()

    ref, t_scipy, m_scipy = measure(plain)
    ref_i = np.where(np.isinf(ref), UNREACHABLE, ref).astype(np.int64)
    agree_full = bool(np.array_equal(exact, ref_i))
    short = (ref_i >= 0) & (ref_i <= horizon)
    agree_bounded = bool(np.array_equal(bounded[short], ref_i[short]) and (bounded[~short] == UNREACHABLE).all())
    # future-goal rows
    lengths = np.diff(offsets)
    ep = rng.integers(0, len(lengths), rows)
    t = rng.integers(0, lengths[ep])
    j = t + 1 + (rng.random(rows) * (lengths[ep] - t)).astype(np.int64)
    first = offsets[ep] + ep
    row_d, t_rows, m_rows = measure(lambda: graph.distances(first + t + 1, first + j))
    within = row_d >= 0
    return {
        "states": n, "cells": cells, "transitions": graph.n_transitions_, "join_pairs": graph.n_joins_,
        "horizon": horizon, "batch": batch,
        "build_s": round(t_build, 3), "build_peak_mb": round(m_build, 1),
        "sample": {"goals": goals, "pairs": int(len(src)),
                   "ours_bounded_s": round(t_ours, 3), "ours_bounded_peak_mb": round(m_ours, 1),
                   "ours_unbounded_s": round(t_full, 3), "ours_unbounded_peak_mb": round(m_full, 1),
                   "scipy_shortest_path_s": round(t_scipy, 3), "scipy_peak_mb": round(m_scipy, 1),
                   "time_ratio_bounded_vs_scipy": round(t_ours / t_scipy, 3),
                   "time_ratio_unbounded_vs_scipy": round(t_full / t_scipy, 3),
                   "memory_ratio_bounded_vs_scipy": round(m_ours / m_scipy, 3),
                   "agree_unbounded": agree_full, "agree_bounded": agree_bounded,
                   "reachable_share": round(float((ref_i >= 0).mean()), 4),
                   "within_horizon_share": round(float(short.mean()), 4)},
        "future_rows": {"rows": rows, "seconds": round(t_rows, 3), "peak_mb": round(m_rows, 1),
                        "seconds_per_million_rows": round(t_rows / rows * 1e6, 1),
                        "within_horizon_share": round(float(within.mean()), 4),
                        "graph_le_steps_share": round(float((row_d[within] <= (j - t)[within]).mean()), 4)},
    }


def _edges(graph):
    rev = graph.rev_indices_
    heads = np.repeat(np.arange(graph.n_states_, dtype=np.int64), np.diff(graph.rev_indptr_))
    return rev, heads


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[250_000, 1_000_000])
    ap.add_argument("--cells", type=int, default=1000, help="bench cells per side")
    ap.add_argument("--goals", type=int, default=32)
    ap.add_argument("--horizon", type=int, default=50)
    ap.add_argument("--rows", type=int, default=20_000)
    ap.add_argument("--batch", type=int, default=256)
    ap.add_argument("--out", default=str(Path(__file__).resolve().parent / "results" / "graph.json"))
    a = ap.parse_args(argv)
    uptime = subprocess.run(["uptime"], capture_output=True, text=True).stdout.strip()
    results = [run_size(s, a.cells, a.goals, a.horizon, a.rows, a.batch) for s in a.sizes]
    for r in results:
        print(json.dumps(r))
    out = {"benchmark": "graph distances vs scipy shortest_path", "machine": platform.platform(),
           "cpus": os.cpu_count(), "uptime_before": uptime,
           "uptime_after": subprocess.run(["uptime"], capture_output=True, text=True).stdout.strip(),
           "sizes": results}
    if len(results) >= 2:
        a0, a1 = results[0], results[-1]
        out["memory_growth"] = {
            "states_ratio": round(a1["states"] / a0["states"], 2),
            "ours_bounded_peak_ratio": round(a1["sample"]["ours_bounded_peak_mb"] / a0["sample"]["ours_bounded_peak_mb"], 2),
            "future_rows_peak_ratio": round(a1["future_rows"]["peak_mb"] / a0["future_rows"]["peak_mb"], 2),
            "scipy_peak_ratio": round(a1["sample"]["scipy_peak_mb"] / a0["sample"]["scipy_peak_mb"], 2)}
    Path(a.out).parent.mkdir(parents=True, exist_ok=True)
    Path(a.out).write_text(json.dumps(out, indent=1) + "\n")
    print(json.dumps(out.get("memory_growth", {})))


if __name__ == "__main__":
    main()
