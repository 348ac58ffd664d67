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
    "heads": 10,     # the multi-head training sampler (goalkit.write.headsampler), per batch
    "shuffle": 11,   # reading a built set: epoch orders, chunk pools (goalkit.write.epochs)
    "mask": 21,      # goal masks: whether a relabelled row gets a random mask (goalkit.masks)
    "mask_set": 22,  # goal masks: which non-empty subset of the groups it keeps
    "graph": 12,     # graph distances: which goal states get one (goalkit.goals.stategraph)
    "head_source": 13,  # sets built with goal heads: which goal source a head's goal of a row uses
    "head_goal": 14,    # sets built with goal heads: where the head's goal comes from (step / state)
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


class BatchBits:
    """Raw random words for numbered batches: a pure function of (seed, stream, batch index).

    For samplers that draw a whole batch at once, hashing every address (:func:`hash64`) costs
    more than the batch's other work. This keeps the addressing convention at batch level: the
    key of the Philox4x64-10 counter generator (Salmon, Moraes, Dror and Shaw, 2011, SC'11) is
    ``(seed, stream)`` and batch ``index`` starts its counter at ``index * 2**64``, so batch
    ``index`` reads the same words whatever batches were drawn before it, and two batches never
    share words (up to 2**66 words a batch). ``random_raw`` output is the algorithm's own, not a
    numpy distribution, so it does not change with the numpy version.

    Parameters
    ----------
    seed : int
        Non-negative integer below 2**63.
    stream : int or str
        A stream number or a name from :data:`STREAMS`.

    Examples
    --------
    >>> bits = BatchBits(7, "heads")
    >>> a = bits.uniform(3, 4); b = bits.uniform(3, 4)
    >>> bool((a == b).all()), bool(((0 <= a) & (a < 1)).all()), bool((a != bits.uniform(4, 4)).any())
    (True, True, True)
    """

    def __init__(self, seed: int, stream: int | str = 0):
        if isinstance(stream, str):
            stream = STREAMS[stream]
        self._key = np.array([int(seed), int(stream)], dtype=np.uint64)
        self._gen = np.random.Philox(key=self._key)

    def raw(self, index: int, count: int) -> np.ndarray:
        """The ``count`` uint64 words of batch ``index`` (non-negative, below 2**64)."""
        counter = np.array([0, int(index), 0, 0], dtype=np.uint64)
        self._gen.state = {"bit_generator": "Philox", "state": {"counter": counter, "key": self._key},
                           "buffer": np.zeros(4, np.uint64), "buffer_pos": 4, "has_uint32": 0,
                           "uinteger": 0}
        return self._gen.random_raw(int(count))

    def uniform(self, index: int, count: int) -> np.ndarray:
        """``count`` float64 uniforms on [0, 1) of batch ``index`` (53 bits each, as :func:`uniform`)."""
        return (self.raw(index, count) >> np.uint64(11)).astype(np.float64) * (1.0 / 9007199254740992.0)


def permutation(seed: int, n: int, episode=0, step=0, stream: int | str = "shuffle") -> np.ndarray:
    """Return a permutation of ``range(n)`` addressed by (seed, episode, step, stream).

    It is the argsort of one 64-bit hash per element (slot = element), so it is a pure function
    of its address, the same on every platform and numpy version (a tie between two hashes,
    probability about n**2 / 2**65, is broken by numpy's sort, the same for the same input).

    Examples
    --------
    >>> p = permutation(3, 5, episode=1)
    >>> sorted(p.tolist()) == list(range(5)) and p.tolist() == permutation(3, 5, episode=1).tolist()
    True
    """
    return np.argsort(hash64(seed, episode, step, np.arange(int(n), dtype=np.int64), stream))
