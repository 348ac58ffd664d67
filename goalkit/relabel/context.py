"""What a relabelling strategy may know beyond its chunk: the episodes of every split."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping

import numpy as np


@dataclass(frozen=True, eq=False)
class RelabelContext:
    """Episodes outside the chunk that strategies may take goals from.

    Parameters
    ----------
    split_episode_ids : mapping of int to ndarray of int64
        Split code -> ids of all episodes of that split (the whole log, not just the chunk),
        sorted ascending (sorted here if not).
    split_lengths : mapping of int to ndarray of int64
        Split code -> transitions per episode, aligned with ``split_episode_ids``.
    split_of : callable or ndarray of int
        Split code of each episode id: either ``split_of(ids) -> int array`` or an array
        indexed by episode id.
    neighbours : object, optional
        Reserved for the neighbour strategy (a neighbour index over goal vectors).
    library : object, optional
        Reserved for the library strategy (a set of external goal vectors).

    Examples
    --------
    >>> ctx = RelabelContext.from_lengths([3, 5, 2], split_codes=[0, 1, 0])
    >>> ctx.split_episode_ids[0].tolist(), ctx.split_lengths[0].tolist()
    ([0, 2], [3, 2])
    >>> ctx.split_codes([1, 2]).tolist()
    [1, 0]
    """

    split_episode_ids: Mapping[int, np.ndarray]
    split_lengths: Mapping[int, np.ndarray]
    split_of: Callable[[np.ndarray], np.ndarray] | np.ndarray
    neighbours: Any = None
    library: Any = None
    graph: Any = None

    def __post_init__(self):
        if set(self.split_episode_ids) != set(self.split_lengths):
            raise ValueError("split_episode_ids and split_lengths must have the same split codes")
        ids_out, len_out = {}, {}
        for code in self.split_episode_ids:
            ids = np.asarray(self.split_episode_ids[code], dtype=np.int64)
            lengths = np.asarray(self.split_lengths[code], dtype=np.int64)
            if ids.shape != lengths.shape or ids.ndim != 1:
                raise ValueError(f"split {code}: ids and lengths must be 1-D of one length")
            order = np.argsort(ids, kind="stable")
            ids_out[int(code)], len_out[int(code)] = ids[order], lengths[order]
        object.__setattr__(self, "split_episode_ids", ids_out)
        object.__setattr__(self, "split_lengths", len_out)
        if not callable(self.split_of):
            object.__setattr__(self, "split_of", np.asarray(self.split_of, dtype=np.int64))

    @classmethod
    def from_lengths(cls, lengths, split_codes=None, **reserved) -> "RelabelContext":
        """Build a context from the whole log's episode lengths (index = episode id).

        Parameters
        ----------
        lengths : array_like of int, shape (E,)
            Transitions of episode id ``0 .. E-1``.
        split_codes : array_like of int, shape (E,), optional
            Split code of every episode id; all 0 (one split) when omitted.
        **reserved
            ``neighbours=`` / ``library=`` passed through.
        """
        lengths = np.asarray(lengths, dtype=np.int64)
        codes = (np.zeros(len(lengths), dtype=np.int64) if split_codes is None
                 else np.asarray(split_codes, dtype=np.int64))
        if codes.shape != lengths.shape:
            raise ValueError("split_codes must have one entry per episode")
        ids = np.arange(len(lengths), dtype=np.int64)
        uniq = np.unique(codes).tolist()
        return cls({c: ids[codes == c] for c in uniq}, {c: lengths[codes == c] for c in uniq},
                   codes, **reserved)

    def split_codes(self, episode_ids) -> np.ndarray:
        """Return the split code (int64) of each episode id."""
        episode_ids = np.asarray(episode_ids, dtype=np.int64)
        if callable(self.split_of):
            return np.asarray(self.split_of(episode_ids), dtype=np.int64).reshape(episode_ids.shape)
        return self.split_of[episode_ids]
