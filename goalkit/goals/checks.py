"""Input checks shared by the embeddings: one place that says what was expected.

Every embedding checks its input once, at ``fit`` / ``transform``, and raises
:class:`~goalkit.errors.EmbeddingError` naming the row (or episode and step, when episode
offsets are known) and what was expected.
"""

from __future__ import annotations

import numpy as np

from goalkit.errors import EmbeddingError


def locate(row: int, offsets: np.ndarray | None) -> dict:
    """Return ``episode=`` / ``step=`` keywords for a row, given row offsets (or ``{}``)."""
    if offsets is None:
        return {}
    e = int(np.searchsorted(offsets, row, side="right") - 1)
    return {"episode": e, "step": int(row - offsets[e])}


def check_features(X, *, name: str = "features", n_features: int | None = None,
                   offsets: np.ndarray | None = None, min_rows: int = 1) -> np.ndarray:
    """Return ``X`` as a 2-D float64 array, or raise EmbeddingError saying what was expected.

    Parameters
    ----------
    X : array_like, shape (M, D)
        Real-valued features, one row per state.
    name : str
        What the array is, for the message.
    n_features : int, optional
        Required number of columns (the width the embedding was fitted on).
    offsets : ndarray of int64, optional
        Row offsets of the episodes, to name episode and step of a bad value.
    min_rows : int
        Fewest rows accepted.

    Raises
    ------
    EmbeddingError
        Not 2-D, not real numbers, wrong width, too few rows, or NaN/inf values.
    """
    arr = np.asarray(X)
    if arr.ndim != 2:
        raise EmbeddingError(f"expected {name} as a 2-D array (states x dimensions), got shape {arr.shape}")
    if not (np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)
            or arr.dtype == np.bool_):
        raise EmbeddingError(f"expected real-valued {name}, got dtype {arr.dtype}")
    if n_features is not None and arr.shape[1] != n_features:
        raise EmbeddingError(f"expected {name} with {n_features} columns (as fitted), got {arr.shape[1]}")
    if arr.shape[0] < min_rows:
        raise EmbeddingError(f"expected at least {min_rows} rows of {name}, got {arr.shape[0]}")
    arr = np.asarray(arr, dtype=np.float64)
    finite = np.isfinite(arr).all(axis=1)
    if not finite.all():
        row = int(np.flatnonzero(~finite)[0])
        raise EmbeddingError(f"expected finite {name}, got NaN or inf in row {row}", **locate(row, offsets))
    return arr


def check_offsets(offsets, n_rows: int, *, name: str = "offsets") -> np.ndarray:
    """Return episode row offsets as int64, or raise EmbeddingError.

    Parameters
    ----------
    offsets : array_like of int, shape (E + 1,)
        Row offsets: episode ``e`` owns rows ``offsets[e] .. offsets[e + 1] - 1`` of the features.
        For state-level features of an EpisodeSet this is ``episodes.state_offsets()``.
    n_rows : int
        Number of feature rows; ``offsets[-1]`` must equal it.
    """
    if offsets is None:
        raise EmbeddingError(f"expected episode {name} (E + 1 row offsets), got None")
    off = np.asarray(offsets)
    if off.ndim != 1 or off.shape[0] < 2 or not np.issubdtype(off.dtype, np.integer):
        raise EmbeddingError(f"expected episode {name} as a 1-D integer array of length E + 1 >= 2, "
                             f"got dtype {off.dtype} shape {off.shape}")
    off = off.astype(np.int64)
    if off[0] != 0 or off[-1] != n_rows:
        raise EmbeddingError(f"expected episode {name} running from 0 to the number of rows {n_rows}, "
                             f"got {int(off[0])} .. {int(off[-1])}")
    bad = np.flatnonzero(np.diff(off) < 0)
    if bad.size:
        raise EmbeddingError(f"expected non-decreasing episode {name}", episode=int(bad[0]))
    return off


def successive_pairs(offsets: np.ndarray) -> np.ndarray:
    """Mask of row pairs ``(i, i + 1)`` that lie inside one episode.

    Parameters
    ----------
    offsets : ndarray of int64, shape (E + 1,)
        Row offsets (checked).

    Returns
    -------
    ndarray of bool, shape (max(N - 1, 0),)
        ``mask[i]`` is true when rows ``i`` and ``i + 1`` belong to the same episode, so the
        difference ``X[i + 1] - X[i]`` never crosses an episode boundary.

    Examples
    --------
    >>> successive_pairs(np.array([0, 3, 3, 5])).astype(int).tolist()
    [1, 1, 0, 1]
    """
    n = int(offsets[-1])
    mask = np.ones(max(n - 1, 0), dtype=bool)
    starts = offsets[1:-1]
    starts = starts[(starts > 0) & (starts < n)]
    mask[starts - 1] = False
    return mask
