"""The published sparse reward and success flag of the multi-goal robotics environments.

Plappert et al. (2018, arXiv:1802.09464, sec. 1) describe the Fetch tasks' sparse reward; the
environments' code is published in Gymnasium-Robotics (on the registry). Rather than quote it
from memory, the tests call the published functions themselves:
``compute_reward`` returns ``-(d > distance_threshold)`` (reward 0 at d == threshold: an
inclusive match) and ``_is_success`` returns ``d < distance_threshold`` (strict).
"""

import inspect
import types

import numpy as np
from gymnasium_robotics.envs.fetch import fetch_env, reach


def fetch_threshold() -> float:
    """The distance threshold the published Fetch reach task registers (read from its source)."""
    text = inspect.getsource(reach)
    values = {float(line.split("=")[1].strip(" ,")) for line in text.splitlines()
              if line.strip().startswith("distance_threshold=")}
    assert len(values) == 1, values
    return values.pop()


def fetch_reward_and_success(achieved: np.ndarray, goal: np.ndarray, threshold: float):
    """Run the published ``compute_reward`` (sparse) and ``_is_success`` on rows of goals."""
    env_class = fetch_env.get_base_fetch_env(object)
    state = types.SimpleNamespace(distance_threshold=threshold, reward_type="sparse")
    reward = env_class.compute_reward(state, achieved, goal, None)
    success = env_class._is_success(state, achieved, goal)
    return np.asarray(reward, np.float32), np.asarray(success, bool)
