"""Benchmark: the multi-head sampler against a plain numpy sampler drawing the same heads.

Invented gantry-like episodes held in memory (goal vectors of every state, observations,
actions; episodes of 50-400 transitions), at 200k and 10M transitions. Both samplers draw, for
batches of 256 transitions, the value / policy / subgoal heads of the published recipe (value:
current 0.2, geometric future 0.5 clipped, random state 0.3; policy: geometric future; subgoal:
k = 25) and give each head its goal, distance, reward, reached flag, terminal flag,
steps-to-goal, discount weight gamma**d, return -(1 - gamma**d)/(1 - gamma) and bootstrap
mask, plus the observation, action and next observation of every row.

The baseline (:class:`NumpyHeads`) is the plain numpy a training script would hold: one
``numpy.random.Generator``, one pass per head, ``numpy.linalg.norm`` for distances. It is
measured in the same run, interleaved with goalkit's :class:`HeadSampler`; the figure is the
ratio of median batch times (baseline / goalkit; > 1 means goalkit is faster). Targets: ratio
>= 1.0, and goalkit's batch time at 10M within 1.5x of its time at 200k (no growth with the
number of transitions).

Usage::

    .venv/bin/python benchmarks/bench_sampler.py                 # 200k and 10M, ~ a minute
    .venv/bin/python benchmarks/bench_sampler.py --sizes 200000 --out /tmp/s.json

Results go to ``benchmarks/results/sampler.json``. 10M transitions hold about 1.2 GB of arrays.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from goalkit.heads import GoalHead  # noqa: E402
from goalkit.reward import RewardRule  # noqa: E402
from goalkit.write.headsampler import HeadSampler  # noqa: E402

GAMMA = 0.99
THRESHOLD = 0.05
HEADS = [GoalHead("value", {"current": 0.2, "geometric": 0.5, "random": 0.3}, gamma=GAMMA),
         GoalHead("policy", {"geometric": 1.0}, gamma=GAMMA),
         GoalHead("subgoal", {"subgoal": 1.0}, gamma=GAMMA, steps=25)]


class NumpyHeads:
    """The baseline: the same three heads in plain numpy, from in-memory arrays."""

    def __init__(self, goals, offsets, observations, actions, seed=0):
        self.goals, self.obs, self.act = goals, observations, actions
        self.off = offsets
        self.len = np.diff(offsets)
        self.n = int(offsets[-1])
        self.ep = np.repeat(np.arange(len(self.len)), self.len)
        self.sep = np.repeat(np.arange(len(self.len)), self.len + 1)
        self.sstart = offsets[:-1] + np.arange(len(self.len))
        self.rng = np.random.default_rng(seed)

    def _geometric(self, t, T):
        return np.minimum(t + self.rng.geometric(1 - GAMMA, size=len(t)), T)

    def _head(self, kind, t, T, e, start, ach):
        b = len(t)
        if kind == "value":
            src = self.rng.choice(3, size=b, p=[0.2, 0.5, 0.3])
            j = np.where(src == 1, self._geometric(t, T), t)
            row = start + j
            rnd = self.rng.integers(0, len(self.goals), size=b)
            row = np.where(src == 2, rnd, row)
            ge = np.where(src == 2, self.sep[rnd], e)
        elif kind == "policy":
            row, ge = start + self._geometric(t, T), e
        else:
            row, ge = start + np.minimum(t + 25, T), e
        j = row - self.sstart[ge]
        steps = np.where((ge == e) & (j >= t), j - t, -1)
        g = self.goals[row]
        d = np.linalg.norm(ach.astype(np.float64) - g, axis=1)
        reached = d <= THRESHOLD
        w = np.where(steps >= 0, GAMMA ** np.maximum(steps, 0), 0.0)
        return {"goal": g, "goal_distance": d.astype(np.float32), "reward": reached.astype(np.float32) - 1,
                "reached": reached.astype(np.uint8), "terminal": reached.astype(np.uint8),
                "steps_to_goal": steps, "discount_weight": w.astype(np.float32),
                "return_to_goal": (-(1 - w) / (1 - GAMMA)).astype(np.float32),
                "bootstrap_mask": (~reached).astype(np.uint8)}

    def batch(self, b):
        i = self.rng.integers(0, self.n, size=b)
        e = self.ep[i]
        t = i - self.off[e]
        T = self.len[e]
        cur = i + e
        ach = self.goals[cur + 1]
        out = {"observation": self.obs[cur], "next_observation": self.obs[cur + 1], "action": self.act[i],
               "reached_goal": ach}
        for kind in ("value", "policy", "subgoal"):
            out[kind] = self._head(kind, t, T, e, cur - t, ach)
        return out


def make_arrays(n_transitions: int, seed: int):
    """Invented episodes: offsets, goals (S, 3) float32, observations (S, 8) float32, actions (N, 3)."""
    g = np.random.default_rng(seed)
    lengths = g.integers(50, 401, n_transitions // 50 + 10)
    lengths = lengths[:np.searchsorted(np.cumsum(lengths), n_transitions) + 1]
    lengths[-1] -= int(lengths.sum() - n_transitions)
    if lengths[-1] < 1:
        lengths = lengths[:-1]
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    n_states = int(offsets[-1]) + len(lengths)
    observations = g.random((n_states, 8), dtype=np.float32)
    goals = np.ascontiguousarray(observations[:, :3])
    actions = g.random((int(offsets[-1]), 3), dtype=np.float32)
    return offsets, goals, observations, actions


def measure(n: int, batches: int, repeats: int, seed: int) -> dict:
    offsets, goals, obs, act = make_arrays(n, seed)
    rule = RewardRule("euclidean", THRESHOLD, form="sparse-negative", end_on_reach=True)
    t0 = time.perf_counter()
    ours = HeadSampler.from_arrays(goals, offsets, rule, HEADS, seed=seed, observations=obs, actions=act)
    setup_ours = time.perf_counter() - t0
    base = NumpyHeads(goals, offsets, obs, act, seed)
    for k in range(20):  # warm up both
        ours.batch(256, k)
        base.batch(256)
    t_ours, t_base = [], []
    index = 0
    for _ in range(repeats):  # interleaved rounds
        t0 = time.perf_counter()
        for _ in range(batches):
            ours.batch(256, index)
            index += 1
        t_ours.append((time.perf_counter() - t0) / batches)
        t0 = time.perf_counter()
        for _ in range(batches):
            base.batch(256)
        t_base.append((time.perf_counter() - t0) / batches)
    mo, mb = float(np.median(t_ours)), float(np.median(t_base))
    out = {"transitions": int(offsets[-1]), "episodes": int(len(offsets) - 1), "batch_size": 256,
           "batches_per_round": batches, "rounds": repeats,
           "goalkit_us_per_batch": round(mo * 1e6, 1), "numpy_us_per_batch": round(mb * 1e6, 1),
           "ratio_numpy_over_goalkit": round(mb / mo, 3), "goalkit_setup_s": round(setup_ours, 3)}
    del ours, base, offsets, goals, obs, act
    gc.collect()
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="200000,10000000", help="transition counts, comma-separated")
    ap.add_argument("--batches", type=int, default=500, help="batches per round")
    ap.add_argument("--repeats", type=int, default=7, help="interleaved rounds; medians are reported")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", default=str(Path(__file__).parent / "results" / "sampler.json"))
    args = ap.parse_args(argv)
    sizes = [int(s) for s in args.sizes.split(",")]
    runs = []
    load_before = os.getloadavg()[0]
    for n in sizes:
        r = measure(n, args.batches, args.repeats, args.seed)
        print(json.dumps(r), flush=True)
        runs.append(r)
    result = {"benchmark": "multi-head sampler vs plain numpy sampler, same heads, in-memory arrays",
              "heads": [h.describe() | {"name": h.name} for h in HEADS],
              "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                          "numpy": np.__version__,
                          "load_average_1min_before_after": [round(load_before, 2), round(os.getloadavg()[0], 2)]},
              "runs": runs}
    if len(runs) > 1:
        result["goalkit_growth_largest_over_smallest"] = round(
            runs[-1]["goalkit_us_per_batch"] / runs[0]["goalkit_us_per_batch"], 3)
        result["numpy_growth_largest_over_smallest"] = round(
            runs[-1]["numpy_us_per_batch"] / runs[0]["numpy_us_per_batch"], 3)
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    print(json.dumps({k: v for k, v in result.items() if k != "runs"}, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
