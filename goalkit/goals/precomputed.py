"""Precomputed embeddings: goal vectors given per logged state, looked up by episode id and step."""

from __future__ import annotations

import numpy as np

from goalkit.errors import EmbeddingError, LogError
from goalkit.goals.base import Embedding, register
from goalkit.goals.checks import check_features, check_offsets
from goalkit.logs import limits


@register
class Precomputed(Embedding):
    """An array aligned with the log's states (e.g. from an external encoder).

    ``fit(values, offsets)`` stores the array and its episode row offsets; state ``t`` of the
    episode with id ``e`` is ``values[offsets[e] + t]``, as in the log's own state-level
    columns (ids are positions in the whole log). ``transform`` takes ``(episode id, step)``
    pairs.

    Attributes
    ----------
    values_ : ndarray (S, G)
        One row per logged state (float32 kept as float32 to save memory).
    offsets_ : ndarray of int64 (E + 1,)
        State row offsets of the whole log: ``lengths + 1`` rows per episode.

    Examples
    --------
    >>> p = Precomputed().fit(np.arange(10.).reshape(5, 2), np.array([0, 2, 5]))
    >>> p.lookup(np.array([1, 0]), np.array([2, 1])).tolist()
    [[8.0, 9.0], [2.0, 3.0]]
    """

    kind = "precomputed"
    input_kind = "state"
    _arrays = ("values_", "offsets_")

    def fit(self, X, offsets=None) -> "Precomputed":
        arr = np.asarray(X)
        if arr.ndim == 2 and arr.shape[1] < 1:
            raise EmbeddingError(f"expected precomputed values with at least 1 column (a goal needs a "
                                 f"dimension), got shape {arr.shape}")
        off = check_offsets(offsets, arr.shape[0] if arr.ndim else 0)
        checked = check_features(arr, name="precomputed values", offsets=off)
        self.values_ = arr.astype(np.float32) if arr.dtype == np.float32 else checked
        self.offsets_ = off
        self._after_load(None)
        return self

    def _after_load(self, file) -> None:
        if (np.ndim(self.values_) != 2 or not np.issubdtype(np.asarray(self.values_).dtype, np.floating)
                or np.shape(self.values_)[1] < 1):
            raise self._shape_error("values_", "a 2-D float array (states x dimensions) with at least 1 "
                                    "dimension", self.values_, file)
        off = np.asarray(self.offsets_)
        if (off.ndim != 1 or off.shape[0] < 2 or not np.issubdtype(off.dtype, np.integer)
                or off[0] != 0 or off[-1] != np.shape(self.values_)[0] or np.any(np.diff(off) < 0)):
            raise EmbeddingError(f"expected non-decreasing state offsets from 0 to {np.shape(self.values_)[0]}",
                                 file=file, key="attr.offsets_")
        self.offsets_ = off.astype(np.int64)
        self.n_features_in_ = 2
        self.output_dim_ = int(np.shape(self.values_)[1])

    @property
    def num_episodes(self) -> int:
        """Episodes the array covers."""
        return int(self.offsets_.shape[0] - 1)

    def lookup(self, episode_ids, steps) -> np.ndarray:
        """Return the vectors of states ``steps`` of episodes ``episode_ids`` (float64 (M, G)).

        Raises
        ------
        EmbeddingError
            An episode id or a step outside the array (naming the first such episode and step).
        """
        self._check_fitted()
        ep = np.asarray(episode_ids, dtype=np.int64).reshape(-1)
        st = np.asarray(steps, dtype=np.int64).reshape(-1)
        if ep.shape != st.shape:
            raise EmbeddingError(f"expected as many steps as episode ids, got {st.shape[0]} and {ep.shape[0]}")
        bad = (ep < 0) | (ep >= self.num_episodes)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise EmbeddingError(f"expected episode ids in 0..{self.num_episodes - 1} (the precomputed array's "
                                 f"episodes)", episode=int(ep[i]))
        n_states = self.offsets_[ep + 1] - self.offsets_[ep]
        bad = (st < 0) | (st >= n_states)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise EmbeddingError(f"expected a step in 0..{int(n_states[i]) - 1} (the precomputed array's states "
                                 f"of this episode)", episode=int(ep[i]), step=int(st[i]))
        return np.asarray(self.values_[self.offsets_[ep] + st], dtype=np.float64)

    def transform(self, X) -> np.ndarray:
        """Return the vectors of ``(episode id, step)`` pairs, an integer array of shape (M, 2)."""
        keys = np.asarray(X)
        if keys.ndim != 2 or keys.shape[1] != 2 or not np.issubdtype(keys.dtype, np.integer):
            raise EmbeddingError(f"expected (episode id, step) pairs as an integer array of shape (M, 2), "
                                 f"got dtype {keys.dtype} shape {keys.shape}")
        return self.lookup(keys[:, 0], keys[:, 1])

    def check_lengths(self, episode_ids, lengths, *, file=None) -> None:
        """Check that episodes ``episode_ids`` have ``lengths`` transitions in the array too.

        Raises
        ------
        EmbeddingError
            The array was made for a log whose episodes have other lengths.
        """
        self._check_fitted()
        ep = np.asarray(episode_ids, dtype=np.int64)
        bad = (ep < 0) | (ep >= self.num_episodes)
        if bad.any():
            raise EmbeddingError(f"expected episode ids in 0..{self.num_episodes - 1} (the precomputed array's "
                                 f"episodes)", file=file, episode=int(ep[np.flatnonzero(bad)[0]]))
        have = self.offsets_[ep + 1] - self.offsets_[ep]
        want = np.asarray(lengths, dtype=np.int64) + 1
        bad = have != want
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise EmbeddingError(f"expected {int(want[i])} precomputed states (the log's episode length + 1), "
                                 f"the array has {int(have[i])}", file=file, episode=int(ep[i]))


def load_values(path) -> np.ndarray:
    """Open a ``.npy`` array of precomputed goal vectors (memory-mapped, never unpickled).

    The file must be a regular file (a FIFO or a device is never opened) whose header declares a
    2-D shape with at least one column and no more data than the file holds.

    Raises
    ------
    EmbeddingError
        Naming the file and what was expected.
    """
    path = str(path)
    size = limits.regular_file(path, what="a .npy array", error=EmbeddingError)
    try:
        with open(path, "rb") as fh:
            version = np.lib.format.read_magic(fh)
            read_header = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                           else np.lib.format.read_array_header_2_0)
            shape, _, dtype = read_header(fh)
            start = fh.tell()
    except (ValueError, OSError, EOFError) as exc:
        raise EmbeddingError(f"expected a .npy array, could not read its header ({exc})", file=path) from None
    if len(shape) != 2 or shape[1] < 1:
        raise EmbeddingError(f"expected an array of shape (states, G) with G >= 1, got shape {shape}", file=path)
    if not dtype.hasobject:
        try:
            limits.check_declared(shape, dtype, max_rows=limits.MAX_LOG_ROWS, max_bytes=size - start,
                                  bound=f"{size - start} bytes of data after the header", file=path, key=None)
        except LogError as exc:
            raise EmbeddingError(exc.message, file=path) from None
    try:
        return np.load(path, allow_pickle=False, mmap_mode="r")
    except (ValueError, OSError) as exc:
        raise EmbeddingError(f"expected a .npy array, could not read it ({type(exc).__name__})", file=path) from None
