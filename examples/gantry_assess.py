"""A held-out goal suite and an offline assessment of two toy checkpoints, on the demo.

    python examples/gantry_assess.py [WORKDIR]

Writes the invented irrigation-gantry demo logs, builds their set, draws a held-out goal suite
from its validation split, trains two toy checkpoints on the training split in seconds on the
CPU (a behaviour-cloning linear fit with numpy's least squares, and a random one, each with a
value function), saves them as a small Python module, and assesses them side by side. The
scores are offline proxies: never a substitute for supervised trials on the machine.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import numpy as np

import goalkit

CHECKPOINTS = '''"""Toy gantry checkpoints: linear maps of [observation, goal, 1] (weights in toy_weights.npz)."""
from pathlib import Path

import numpy as np

_W = np.load(Path(__file__).with_name("toy_weights.npz"))


def _features(batch):
    obs, goal = batch["observation"], batch["goal"]
    return np.hstack([obs, goal, np.ones((len(goal), 1))]).astype(np.float64)


def bc_policy(batch):
    return _features(batch) @ _W["bc_policy"]


def random_policy(batch):
    return _features(batch) @ _W["random_policy"]


def bc_value(batch):
    return _features(batch) @ _W["bc_value"]


def random_value(batch):
    return _features(batch) @ _W["random_value"]
'''


def train(set_path, folder: Path, seed: int = 0) -> None:
    """Fit the toy checkpoints on the training split and write them into ``folder``."""
    with goalkit.open_set(set_path) as gs:
        tr = gs.read("train", ["observation", "goal", "action", "steps_to_goal"])
    x = np.hstack([tr["observation"], tr["goal"], np.ones((len(tr["goal"]), 1))]).astype(np.float64)
    bc_policy = np.linalg.lstsq(x, tr["action"].astype(np.float64), rcond=None)[0]
    later = tr["steps_to_goal"] > 0  # value: regress -steps-to-goal where the log reaches the goal
    bc_value = np.linalg.lstsq(x[later], -tr["steps_to_goal"][later].astype(np.float64), rcond=None)[0]
    r = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    np.savez(folder / "toy_weights.npz", bc_policy=bc_policy, random_policy=r.normal(size=bc_policy.shape) * 0.1,
             bc_value=bc_value, random_value=r.normal(size=bc_value.shape))
    (folder / "gantry_toy_ck.py").write_text(CHECKPOINTS)


def main(workdir: Path) -> dict:
    demo = goalkit.make_demo(workdir / "demo", episodes=200, seed=3)
    built = goalkit.build(demo["recipe"])
    suite = goalkit.make_suite(built.path, workdir / "gantry-suite.h5", per_cell=50, seed=0)
    print(f"suite: {suite.rows} held-out pairs from {suite.counts['episodes']} episodes; card {suite.card.name}")
    train(built.path, workdir / "ckpts")
    result = goalkit.assess(built.path, suite.path, import_path=workdir / "ckpts",
                            policies=["gantry_toy_ck:bc_policy", "gantry_toy_ck:random_policy"],
                            values=["gantry_toy_ck:bc_value", "gantry_toy_ck:random_value"], resamples=500)
    print(result.render())
    plots = result.write_plots(workdir / "assess-plots")
    print(f"plots: {', '.join(p.name for p in plots)}")
    return result.report


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path(tempfile.mkdtemp(prefix="gantry-assess-")))
