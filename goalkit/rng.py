"""Counter-based random numbers: a pure function of (seed, episode id, step, slot, stream).

Every random draw in a build is addressed by *what it is for* rather than by the order in
which it is made, so results do not depend on chunk size, worker count or scheduling.
The mixing function is SplitMix64's finaliser (Steele, Lea and Flood, 2014), applied to a
key built from the address; it is vectorised numpy over whole chunks.
"""

from __future__ import annotations

import numpy as np

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)

#: Named streams, so that two uses of randomness never share numbers.
STREAMS = {
    "strategy": 1,   # which strategy a goal slot uses
    "goal": 2,       # where in the episode the goal comes from
    "episode": 3,    # which other episode a goal comes from
    "neighbour": 4,  # which neighbour / which later step of it
    "split": 5,      # reserved
    "sampler": 6,    # on-the-fly relabelling in the training sampler
    "subsample": 7,  # subsampling for fitting / recall measurement
    "hop": 8,        # neighbour goals: the later step taken along the joined episode
    "bootstrap": 9,  # threshold tuning: episode resamples (goalkit.thresholds.bootstrap)
    "graph": 10,     # graph distances: which goal states get one (goalkit.goals.stategraph)
}
# Stream numbers 1001-1005 are taken by the demo simulator (goalkit.demo.controllers.DEMO_STREAMS).


def _mix(z: np.ndarray) -> np.ndarray:
    z = z.copy()
    z ^= z >> np.uint64(30)
    z *= _M1
    z ^= z >> np.uint64(27)
    z *= _M2
    z ^= z >> np.uint64(31)
    return z


def hash64(seed: int, episode, step, slot=0, stream: int | str = 0) -> np.ndarray:
    """Return uint64 hashes of the addresses (broadcast over the array arguments).

    Parameters
    ----------
    seed : int
        The build's seed (any non-negative integer below 2**63).
    episode, step, slot : array_like of int
        Episode id, step and goal slot; broadcast together.
    stream : int or str
        A stream number or a name from :data:`STREAMS`.

    Returns
    -------
    numpy.ndarray of uint64
    """
    if isinstance(stream, str):
        stream = STREAMS[stream]
    with np.errstate(over="ignore"):
        z = _mix(np.asarray([seed], dtype=np.uint64) * _GOLDEN + np.uint64(stream))
        for part in (episode, step, slot):
            z = _mix((z + np.asarray(part).astype(np.int64).astype(np.uint64)) * _GOLDEN)
    return z


def uniform(seed: int, episode, step, slot=0, stream: int | str = 0) -> np.ndarray:
    """Return float64 numbers uniform on [0, 1), one per address (53 random bits each).

    Examples
    --------
    >>> u = uniform(7, episode=np.zeros(3, int), step=np.arange(3))
    >>> bool(((0 <= u) & (u < 1)).all())
    True
    >>> bool((u == uniform(7, np.zeros(3, int), np.arange(3))).all())
    True
    """
    h = hash64(seed, episode, step, slot, stream)
    return (h >> np.uint64(11)).astype(np.float64) * (1.0 / 9007199254740992.0)


def integers(seed: int, low, high, episode, step, slot=0, stream: int | str = 0) -> np.ndarray:
    """Return int64 numbers uniform on ``{low, ..., high - 1}`` (array bounds allowed, ``high > low``).

    Uses the multiply-shift mapping of a 53-bit uniform; the bias is below 2**-30 for
    ranges under 2**23 and irrelevant for the episode lengths seen in practice.
    """
    low = np.asarray(low, dtype=np.int64)
    span = np.asarray(high, dtype=np.int64) - low
    u = uniform(seed, episode, step, slot, stream)
    out = low + np.floor(u * span).astype(np.int64)
    return np.minimum(out, low + span - 1)
