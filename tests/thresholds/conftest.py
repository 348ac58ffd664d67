"""Fixtures of the tune command tests: one small invented gantry demo per test session."""

from pathlib import Path

import h5py
import numpy as np
import pytest

from goalkit.demo import make_demo


@pytest.fixture(scope="session")
def gantry(tmp_path_factory) -> Path:
    """Folder with the demo logs, layout and recipe (60 episodes, seed 3); treat as read-only."""
    out = tmp_path_factory.mktemp("gantry")
    make_demo(out, episodes=60, seed=3)
    return out


@pytest.fixture(scope="session")
def raw_logs(gantry) -> dict:
    """The demo logs read straight with h5py (not through goalkit's readers).

    Per transition: ``achieved`` = (head, trays) of s_{t+1}, ``current`` = of s_t, the logged
    ``task_goal`` and ``success``, and the episode position; episodes in group-name order.
    """
    parts = {k: [] for k in ("achieved", "current", "task_goal", "success", "episode")}
    with h5py.File(gantry / "gantry-logs.h5", "r") as f:
        for e, name in enumerate(sorted(f["bench"])):
            g = f["bench"][name]
            state = np.concatenate([g["head"][()], g["trays"][()]], axis=1)
            parts["achieved"].append(state[1:])
            parts["current"].append(state[:-1])
            parts["task_goal"].append(g["task_goal"][()])
            parts["success"].append(g["success"][()].astype(bool))
            parts["episode"].append(np.full(len(state) - 1, e))
    return {k: np.concatenate(v) for k, v in parts.items()}
