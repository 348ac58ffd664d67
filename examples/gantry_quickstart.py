"""From demo logs to minibatches, with the Python API.

    python examples/gantry_quickstart.py [WORKDIR]

Writes the invented irrigation-gantry demo logs, builds the goal-conditioned set its recipe
describes, verifies it, then reads training batches two ways: streamed from the built file, and
relabelled on the fly with fresh goals per batch.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import numpy as np

import goalkit


def main(workdir: Path) -> dict:
    demo = goalkit.make_demo(workdir, episodes=60, seed=3)
    recipe = goalkit.load_recipe(demo["recipe"])
    result = goalkit.build(recipe)            # in this process; runner=goalkit.LocalWorkers(2) scales out
    report = goalkit.verify(result.path)
    print(f"built {result.path.name}: {result.summary['rows']['train']} train rows; verify ok={report.ok}")

    seen = 0
    with goalkit.open_set(result.path) as goals:
        for batch in goals.batches("train", batch_size=512, shuffle=True, seed=0):
            obs, act, goal, rew = batch["observation"], batch["action"], batch["goal"], batch["reward"]
            seen += len(rew)  # a training step would consume (obs, act, goal, rew) here
    print(f"streamed {seen} rows; observation width {obs.shape[1]}, action width {act.shape[1]}, "
          f"goal width {goal.shape[1]}, last batch's mean reward {float(np.mean(rew)):.3f}")

    sampler = goalkit.GoalSampler(recipe)
    fresh = sampler.batch(256, index=0)
    print(f"on-the-fly batch: {len(fresh['reward'])} rows, reached share {float(fresh['reached'].mean()):.3f}")
    return {"rows": seen, "ok": report.ok, "fresh": len(fresh["reward"])}


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path(tempfile.mkdtemp(prefix="gantry-")))
