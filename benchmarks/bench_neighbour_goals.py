"""Benchmark: neighbour-goal relabelling on 1M logged states, approximate index against exact search.

Invented irrigation-gantry states (``bench_neighbours.gantry_states``: 5,000 episodes of 200
states, 16 columns), embedded with goalkit's whitened 16-dimensional PCA; one split holding all
1M states. Measured in one run, on the same data, with the same faiss thread count:

* :func:`goalkit.relabel.search.build_goal_search` with ``method="ivf"`` (tuned to filtered
  recall@10 >= 0.95, own episode excluded) and with ``method="exact"`` (flat search);
* relabelling a sample of episodes with ``Mixture({"neighbour": 1})`` (every transition, four goal
  slots; every state of each episode is searched, as in a build) through each of the two;
* recall@10 of the IVF candidates against the exact candidates on exactly those episodes'
  states (tie-aware, own episode excluded), besides the calibrated value the build reports.

Target: relabelling at least 30x faster with IVF than with exact search, at recall@10 >= 0.95.
The timed runs exclude the index builds (reported separately); ``projected_whole_log_*`` adds
them to the per-episode cost scaled to every episode of the log.

Usage::

    .venv/bin/python benchmarks/bench_neighbour_goals.py              # 1M states, ~ 5 minutes
    .venv/bin/python benchmarks/bench_neighbour_goals.py --states 100000 --out /tmp/g.json

Results go to ``benchmarks/results/neighbour_goals.json``.
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
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_neighbours import STEPS_PER_EPISODE, gantry_states  # noqa: E402
from goalkit.goals.linear import PCA  # noqa: E402
from goalkit.logs.episodes import EpisodeSet  # noqa: E402
from goalkit.relabel import Mixture, RelabelContext  # noqa: E402
from goalkit.relabel.search import build_goal_search  # noqa: E402
from goalkit.reward import RewardRule  # noqa: E402


def sample_chunk(states: np.ndarray, episode_ids: np.ndarray) -> EpisodeSet:
    """The sampled episodes as one chunk (observations = their goal vectors)."""
    T1 = STEPS_PER_EPISODE
    obs = np.concatenate([states[e * T1:(e + 1) * T1] for e in episode_ids])
    n = len(episode_ids)
    return EpisodeSet(observations=obs, actions=np.zeros((n * (T1 - 1), 1)),
                      offsets=np.arange(n + 1, dtype=np.int64) * (T1 - 1), episode_ids=episode_ids)


def candidate_recall(ivf, exact, episode_ids, k) -> float:
    """Tie-aware recall@k of IVF candidates against exact ones, over every state of the episodes."""
    sp = exact.splits[0]
    per = []
    for e in episode_ids.tolist():
        ev, es, ec = exact.candidates("neighbour", e)
        iv, is_, ic = ivf.candidates("neighbour", e)
        p = int(np.searchsorted(sp.episode_ids, e))
        q = sp.vectors[sp.state_offsets[p]:sp.state_offsets[p + 1]].astype(np.float64)

        def dist(eps, steps):
            rows = sp.state_offsets[np.searchsorted(sp.episode_ids, np.maximum(eps, 0))] + np.maximum(steps, 0)
            d = np.linalg.norm(sp.vectors[rows].astype(np.float64) - q[:, None, :], axis=2)
            return np.where(eps >= 0, d, np.inf)

        d_ex, d_iv = dist(ev, es), dist(iv, is_)
        kth = d_ex[np.arange(len(q)), np.maximum(ec - 1, 0)]
        hit = (d_iv <= kth[:, None] * (1 + 1e-9) + 1e-12) & np.isfinite(d_iv)
        per.append(hit.sum(axis=1) / np.maximum(ec, 1))
    return float(np.concatenate(per).mean())


def main(argv=None) -> dict:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--states", type=int, default=1_000_000, help="logged states to index")
    p.add_argument("--episodes", type=int, default=20, help="episodes relabelled in the timed runs")
    p.add_argument("--k", type=int, default=10)
    p.add_argument("--target-recall", type=float, default=0.95)
    p.add_argument("--threshold", type=float, default=0.1, help="reward threshold in the embedding")
    p.add_argument("--threads", type=int, default=1, help="faiss threads (same for exact and IVF)")
    p.add_argument("--out", default=str(Path(__file__).with_name("results") / "neighbour_goals.json"))
    a = p.parse_args(argv)

    n_ep = a.states // STEPS_PER_EPISODE
    X = gantry_states(n_ep, seed=1)
    offsets = np.arange(0, n_ep + 1, dtype=np.int64) * STEPS_PER_EPISODE
    E = PCA(n_components=16, whiten=True).fit(X, offsets).transform(X).astype(np.float32)
    ids = np.arange(n_ep, dtype=np.int64)
    lengths = np.full(n_ep, STEPS_PER_EPISODE - 1, np.int64)
    splits = np.zeros(n_ep, np.int64)
    rule = RewardRule("euclidean", a.threshold)
    res = {"states": int(E.shape[0]), "dims": int(E.shape[1]), "episodes": int(n_ep), "k": a.k,
           "target_recall": a.target_recall, "threads": a.threads, "relabelled_episodes": a.episodes,
           "machine": {"python": platform.python_version(), "cpus": os.cpu_count()}}

    def build(method):
        t = time.perf_counter()
        s = build_goal_search(E, ids, lengths, splits, rule, k=a.k, method=method,
                              target_recall=a.target_recall, seed=0, threads=a.threads)
        return time.perf_counter() - t, s

    t_ivf_build, ivf = build("ivf")
    t_exact_build, exact = build("exact")
    chosen = np.linspace(0, n_ep - 1, a.episodes).round().astype(np.int64)
    chunk = sample_chunk(E, chosen)
    mix = Mixture({"neighbour": 1.0}, goals_per_transition=4, neighbours=a.k)

    def relabel(search):
        ctx = RelabelContext.from_lengths(lengths, splits, neighbours=search)
        t = time.perf_counter()
        rows = mix.assign(chunk, 0, ctx)
        return time.perf_counter() - t, rows

    t_ivf, rows_ivf = relabel(ivf)
    t_ivf = min(t_ivf, relabel(ivf)[0])
    t_exact, rows_exact = relabel(exact)
    recall = candidate_recall(ivf, exact, chosen, a.k)
    same_goal = float(np.mean((rows_ivf.goal_episode == rows_exact.goal_episode)
                              & (rows_ivf.goal_step == rows_exact.goal_step)))
    res["goal_search_ivf"] = ivf.describe()["train"]
    res["build_seconds"] = {"ivf": t_ivf_build, "exact": t_exact_build}
    res["relabel_seconds"] = {"ivf": t_ivf, "exact_flat": t_exact}
    res["relabelled_rows"] = int(len(rows_ivf))
    res["speedup_ivf_vs_exact"] = t_exact / t_ivf
    res["recall_at_k_relabelled_states"] = recall
    res["recall_at_k_calibrated"] = res["goal_search_ivf"]["recall"]
    res["same_goal_fraction_ivf_vs_exact"] = same_goal
    res["rows_per_second"] = {"ivf": len(rows_ivf) / t_ivf, "exact_flat": len(rows_exact) / t_exact}
    # the whole log relabelled the same way (per-episode cost times episodes, plus the index build)
    scale = n_ep / a.episodes
    full = {"ivf": t_ivf_build + t_ivf * scale, "exact_flat": t_exact_build + t_exact * scale}
    res["projected_whole_log_seconds"] = full
    res["projected_whole_log_speedup"] = full["exact_flat"] / full["ivf"]
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
