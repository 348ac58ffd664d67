"""The episode-level train/validation split, by a stable hash of the episode id."""

from __future__ import annotations

import numpy as np

from goalkit import rng


def split_codes(episode_ids, validation: float, salt: int = 0) -> np.ndarray:
    """Return 0 (train) or 1 (validation) for each episode id.

    The code depends only on ``(salt, episode id)``, never on the seed, the chunking or the
    other episodes, so an episode stays in its split when logs grow or the seed changes.

    Parameters
    ----------
    episode_ids : array_like of int
    validation : float
        Expected fraction of episodes in the validation split, in [0, 1).
    salt : int
        Changes the assignment without changing the fraction.

    Returns
    -------
    numpy.ndarray of int8

    Examples
    --------
    >>> split_codes([0, 1, 2, 3], validation=0.0).tolist()
    [0, 0, 0, 0]
    """
    ids = np.asarray(episode_ids, dtype=np.int64)
    u = rng.uniform(salt, ids, 0, 0, stream="split")
    return (u < validation).astype(np.int8)
