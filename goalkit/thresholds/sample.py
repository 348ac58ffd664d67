"""A deterministic sample of whole episodes, so tuning stays fast on big logs.

Each kept episode gets a key ``goalkit.rng.uniform(seed, episode_id, step=-1, slot=0,
stream="subsample")`` (step -1: a per-episode draw that no per-state draw of the same stream
uses). Episodes are taken in ascending key order while the running transition count stays
within the budget; the first episode in key order is always taken, so the sample is never
empty. The sample depends only on (seed, episode ids, lengths, budget), never on chunking.

:class:`SampledSource` exposes the chosen episodes as a
:class:`~goalkit.logs.episodes.LogSource`, reading consecutive runs of them from the
underlying log a chunk at a time; episode ids stay the log's own, so every per-episode draw
of the build (strategies, goal steps) is the same on the sample as in a full build.
"""

from __future__ import annotations

import numpy as np

from goalkit import rng
from goalkit.logs.episodes import EpisodeSet, concat_episodes, consecutive_runs, read_task_ids  # noqa: F401 (re-exported)
from goalkit.logs.source import CHECK_CHUNK

#: The per-episode address used for the sample key (no per-state draw uses step -1).
SAMPLE_STEP = -1


def sample_episodes(episode_ids, lengths, max_transitions: int, seed: int) -> np.ndarray:
    """Positions (ascending) of the episodes a budget of ``max_transitions`` keeps.

    Parameters
    ----------
    episode_ids : array_like of int, shape (E,)
        Stable episode ids.
    lengths : array_like of int, shape (E,)
        Transitions per episode.
    max_transitions : int
        Budget (>= 1). When the whole log fits, every position is returned.
    seed : int
        Seed of the keys.

    Returns
    -------
    ndarray of int64
        Sorted positions ``0 .. E-1`` of the chosen episodes.

    Examples
    --------
    >>> sample_episodes([0, 1, 2, 3], [10, 10, 10, 10], 100, seed=0).tolist()
    [0, 1, 2, 3]
    >>> len(sample_episodes([0, 1, 2, 3], [10, 10, 10, 10], 25, seed=0))
    2
    """
    ids = np.asarray(episode_ids, dtype=np.int64)
    lengths = np.asarray(lengths, dtype=np.int64)
    if int(lengths.sum()) <= max_transitions:
        return np.arange(ids.size, dtype=np.int64)
    key = rng.uniform(seed, ids, SAMPLE_STEP, slot=0, stream="subsample")
    order = np.argsort(key, kind="stable")
    total = np.cumsum(lengths[order])
    take = max(1, int(np.searchsorted(total, max_transitions, side="right")))
    return np.sort(order[:take]).astype(np.int64)


class SampledSource:
    """The chosen episodes of a log, as a log of their own.

    Parameters
    ----------
    source : LogSource
        The opened log.
    positions : array_like of int
        Sorted positions (in ``source``) of the episodes to expose.

    Attributes
    ----------
    path, fields, files, notes, skipped
        Those of ``source``.
    lengths, episode_ids : ndarray of int64
        Of the chosen episodes (ids are the log's own).
    positions : ndarray of int64
        The chosen positions in ``source``.
    """

    def __init__(self, source, positions):
        self.source = source
        self.positions = np.asarray(positions, dtype=np.int64)
        self.path = source.path
        self.fields = source.fields
        self.files = list(getattr(source, "files", []))
        self.notes = list(getattr(source, "notes", []))
        self.skipped = list(getattr(source, "skipped", []))
        self.lengths = np.asarray(source.lengths, dtype=np.int64)[self.positions]
        self.episode_ids = np.asarray(source.episode_ids, dtype=np.int64)[self.positions]

    def read(self, start: int, stop: int) -> EpisodeSet:
        """Read chosen episodes ``start .. stop - 1`` (positions within the sample)."""
        pos = self.positions[start:stop]
        parts = [self.source.read(int(pos[a]), int(pos[b - 1]) + 1) for a, b in consecutive_runs(pos)]
        return concat_episodes(parts)

    def known_task_ids(self) -> np.ndarray | None:
        """The task id of each chosen episode: the log's own when its reader knows them, else read."""
        if hasattr(self.source, "known_task_ids"):
            known = self.source.known_task_ids()
            return None if known is None else known[self.positions]
        return read_task_ids(self, CHECK_CHUNK)

    def __getattr__(self, name):
        # Reader attributes the pipeline may look at (layout, convention, dtypes ...).
        if name == "source":
            raise AttributeError(name)
        return getattr(self.source, name)
