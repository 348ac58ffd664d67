"""The published sparse reward and success flag of the multi-goal robotics environments.

Plappert et al. (2018, arXiv:1802.09464, sec. 1) describe the Fetch tasks: goals are reached
within a 5 cm distance threshold, and the reward is sparse. Their published environment code
(from memory, not run here) computes the reward as ``-(d > threshold)``, so the reward is 0 at
``d == threshold`` (an inclusive match), and the success flag as ``d < threshold`` (strict).
The two functions below restate those two expressions, and nothing else, so the tests can hold
goalkit's rules against them.
"""

import numpy as np

#: The Fetch tasks' distance threshold in metres (Plappert et al., 2018, sec. 1; from memory).
FETCH_THRESHOLD = 0.05


def fetch_threshold() -> float:
    """The published 5 cm distance threshold (from memory)."""
    return FETCH_THRESHOLD


def fetch_reward_and_success(achieved: np.ndarray, goal: np.ndarray, threshold: float):
    """The published sparse reward ``-(d > threshold)`` and success flag ``d < threshold``."""
    d = np.linalg.norm(np.asarray(achieved, np.float64) - np.asarray(goal, np.float64), axis=-1)
    return -(d > threshold).astype(np.float32), d < threshold
