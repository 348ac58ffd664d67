"""A LogSource over arrays already in memory (for Python callers and tests)."""

from __future__ import annotations

import numpy as np

from goalkit.logs.episodes import EpisodeSet


class MemorySource:
    """Serve an :class:`EpisodeSet` through the LogSource interface.

    Parameters
    ----------
    episodes : EpisodeSet
        All episodes of the "log"; their ``episode_ids`` must be increasing.
    files : list of str, optional
        Files to checksum into a dataset's provenance (none by default).

    Examples
    --------
    >>> import numpy as np
    >>> ep = EpisodeSet(observations=np.zeros((5, 2)), actions=np.zeros((3, 1)),
    ...                 offsets=np.array([0, 2, 3]), episode_ids=np.array([0, 1]))
    >>> MemorySource(ep).read(1, 2).num_transitions
    1
    """

    def __init__(self, episodes: EpisodeSet, files=()):
        ids = np.asarray(episodes.episode_ids, dtype=np.int64)
        if np.any(np.diff(ids) <= 0):
            raise ValueError("episode_ids must be increasing")
        self.episodes = episodes
        self.path = episodes.source or "<memory>"
        self.files = list(files)
        self.lengths = episodes.lengths
        self.episode_ids = ids
        self.fields = dict(episodes.fields)
        self.notes: list[str] = []
        self.skipped: list = []

    def read(self, start: int, stop: int) -> EpisodeSet:
        """Episodes at positions ``start .. stop - 1``."""
        return self.episodes.select(start, stop)
