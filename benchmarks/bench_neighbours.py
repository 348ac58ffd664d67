"""Benchmark: neighbour queries, embedding fits and index memory on 1M logged states.

Invented irrigation-gantry states (nozzle head x-y-z and velocity, eight tray positions along
the bench, valve and light readings: 16 dimensions), 200 states per episode. Measured in one
run, on the same data, with the same faiss thread count:

* exact flat search (``IndexFlatL2``) against the recall-tuned IVF-flat index built by
  :func:`goalkit.goals.neighbours.build_index` (tuned on 4000 held-out calibration states),
  on 4000 other held-out query states; target: IVF at least 30x faster at recall@10 >= 0.95
  (recall measured against the exact results of the same run);
* PCA and SFA (linear and degree-2) fit times, against scikit-learn's PCA on the same data;
* index memory (serialised faiss index) against the float32 vectors themselves.

Usage::

    .venv/bin/python benchmarks/bench_neighbours.py            # 1M states, ~ a few minutes
    .venv/bin/python benchmarks/bench_neighbours.py --states 100000 --out /tmp/n.json

Results go to ``benchmarks/results/neighbours.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from goalkit.goals.linear import PCA  # noqa: E402
from goalkit.goals.neighbours import IndexSettings, build_index, faiss_threads, recall_at_k  # noqa: E402
from goalkit.goals.sfa import SFA  # noqa: E402

STEPS_PER_EPISODE = 200  # states per episode
TRAYS = 8


def gantry_states(n_episodes: int, seed: int) -> np.ndarray:
    """Invented gantry states, (n_episodes * 200, 16) float64, episodes concatenated."""
    g = np.random.default_rng(seed)
    T = STEPS_PER_EPISODE
    # nozzle head: a smooth random path inside the 2.0 x 0.8 x 0.4 m working box
    acc = g.normal(0, 1, (n_episodes, T, 3))
    vel = np.cumsum(acc, axis=1) * 0.002
    vel -= vel.mean(axis=1, keepdims=True)
    start = g.uniform([0, 0, 0.05], [2.0, 0.8, 0.4], (n_episodes, 1, 3))
    head = np.clip(start + np.cumsum(vel, axis=1) * 0.2, [0, 0, 0.05], [2.0, 0.8, 0.4])
    hvel = np.diff(head, axis=1, prepend=head[:, :1]) / 0.2
    # trays: start positions; one tray slides by up to 0.5 m during an episode
    trays = np.sort(g.uniform(0, 2.0, (n_episodes, 1, TRAYS)), axis=2).repeat(T, axis=1)
    moved = g.integers(0, TRAYS, n_episodes)
    t0 = g.integers(0, T // 2, n_episodes)
    dist = g.uniform(-0.5, 0.5, n_episodes)
    frac = np.clip((np.arange(T)[None, :] - t0[:, None]) / 40.0, 0, 1)
    trays[np.arange(n_episodes), :, moved] += frac * dist[:, None]
    # valve opening (on while the head is low) and light strip reading (follows head x)
    valve = (head[:, :, 2:3] < 0.15).astype(float) + g.normal(0, 0.01, (n_episodes, T, 1))
    light = np.cos(head[:, :, 0:1] * 3.0) + g.normal(0, 0.01, (n_episodes, T, 1))
    X = np.concatenate([head, hvel, trays, valve, light], axis=2)
    return X.reshape(n_episodes * T, 16)


def one_state_per_episode(n: int, seed: int) -> np.ndarray:
    """``n`` held-out states, one random step of each of ``n`` new episodes."""
    X = gantry_states(n, seed)
    steps = np.random.default_rng(seed + 100).integers(0, STEPS_PER_EPISODE, n)
    return X[np.arange(n) * STEPS_PER_EPISODE + steps]


def timed(fn, repeat: int):
    """Best wall time of ``repeat`` calls and the last result."""
    best, out = float("inf"), None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def main(argv=None) -> dict:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--states", type=int, default=1_000_000, help="logged states to index")
    p.add_argument("--queries", type=int, default=4000, help="held-out query states")
    p.add_argument("--calibration", type=int, default=4000, help="held-out states the index is tuned on")
    p.add_argument("--k", type=int, default=10)
    p.add_argument("--target-recall", type=float, default=0.95)
    p.add_argument("--threads", type=int, default=1, help="faiss threads (same for exact and IVF)")
    p.add_argument("--out", default=str(Path(__file__).with_name("results") / "neighbours.json"))
    a = p.parse_args(argv)

    n_ep = a.states // STEPS_PER_EPISODE
    X = gantry_states(n_ep, seed=1)
    offsets = np.arange(0, n_ep + 1, dtype=np.int64) * STEPS_PER_EPISODE
    Q_raw = one_state_per_episode(a.queries, seed=2)
    C_raw = one_state_per_episode(a.calibration, seed=3)
    res = {"states": int(X.shape[0]), "dims": int(X.shape[1]), "episodes": int(n_ep), "queries": int(Q_raw.shape[0]),
           "k": a.k, "target_recall": a.target_recall, "threads": a.threads,
           "machine": {"python": platform.python_version(), "cpus": os.cpu_count()}}

    # ---- embedding fits ----------------------------------------------------------------------
    from sklearn.decomposition import PCA as SkPCA

    t_sk, _ = timed(lambda: SkPCA(n_components=16, svd_solver="full").fit(X), 1)
    t_pca, pca = timed(lambda: PCA(n_components=16, whiten=True).fit(X, offsets), 3)
    t_sfa1, _ = timed(lambda: SFA(n_components=16, degree=1).fit(X, offsets), 2)
    t_sfa2, sfa2 = timed(lambda: SFA(n_components=16, degree=2).fit(X, offsets), 1)
    res["fit_seconds"] = {"sklearn_pca_baseline": t_sk, "pca": t_pca, "sfa_linear": t_sfa1, "sfa_quadratic": t_sfa2}
    res["fit_ratio_vs_sklearn_pca"] = {"pca": t_pca / t_sk, "sfa_linear": t_sfa1 / t_sk, "sfa_quadratic": t_sfa2 / t_sk}
    res["sfa_quadratic_expanded_dim"] = int(sfa2.expansion_mean_.shape[0])

    # ---- neighbour index on the 16-D whitened PCA embedding ----------------------------------
    E = pca.transform(X).astype(np.float32)
    Q = pca.transform(Q_raw).astype(np.float32)
    settings = IndexSettings(method="ivf", k=a.k, target_recall=a.target_recall, seed=0, threads=a.threads)
    C = pca.transform(C_raw).astype(np.float32)
    t_build, ivf = timed(lambda: build_index(E, settings, calibration=C), 1)
    self_tuned = build_index(E, settings).report  # default calibration: a sample of the indexed states
    exact = build_index(E, IndexSettings(method="exact", k=a.k, threads=a.threads))
    with faiss_threads(a.threads):
        t_exact, (_, ex_ids) = timed(lambda: exact._index.search(Q, a.k), 2)
        t_ivf, (_, iv_ids) = timed(lambda: ivf._index.search(Q, a.k), 5)
    t_wrapped, _ = timed(lambda: ivf.search(Q, a.k), 3)
    recall = recall_at_k(E, Q, iv_ids.astype(np.int64), ex_ids.astype(np.int64))
    res["index"] = ivf.report.as_dict()
    res["index_default_calibration"] = self_tuned.as_dict()
    res["index_build_seconds"] = t_build
    res["query_seconds"] = {"exact_flat": t_exact, "ivf": t_ivf, "ivf_with_goalkit_wrapper": t_wrapped}
    res["speedup_ivf_vs_exact"] = t_exact / t_ivf
    res["speedup_wrapper_vs_exact"] = t_exact / t_wrapped
    res["recall_at_k_heldout"] = recall
    res["memory_bytes"] = {"vectors_float32": int(E.nbytes), "exact_index": exact.report.memory_bytes,
                           "ivf_index": ivf.report.memory_bytes}
    # NeighbourIndex also keeps the float32 vectors (for float64 distances and recall checks)
    res["memory_bytes"]["ivf_index_plus_kept_vectors"] = int(ivf.report.memory_bytes + E.nbytes)
    res["memory_ratio_ivf_vs_vectors"] = ivf.report.memory_bytes / E.nbytes
    res["targets"] = {"speedup_at_least_30": res["speedup_ivf_vs_exact"] >= 30,
                      "recall_at_least_target": recall >= a.target_recall}
    out = Path(a.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text(json.dumps(res, indent=2, sort_keys=True) + "\n")
    os.replace(tmp, out)
    print(json.dumps(res, indent=2, sort_keys=True))
    return res


if __name__ == "__main__":
    main()
