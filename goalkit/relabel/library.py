"""A goal library: target goals given by the user, matched against every logged state.

The recipe names an ``.npy`` or ``.npz`` file (``[relabel] library = "targets.npy"``) holding
either goal vectors ``(L, G)`` in the recipe's goal space, or camera frames ``uint8 (L, H, W[, C])``
when the goal map is a frame embedding (they are then mapped through the embedding). An
``.npz`` holds one array, or several with the targets under the key ``targets``.

:func:`match_library` finds every logged state within the reward threshold of each target: a
faiss range search over the targets (exact, in the rule's search space, radius widened a little
so float32 rounding cannot drop a pair), then the rule's own distance on the stored values
decides. The matches are kept per episode, sorted by step, for the ``library`` strategy.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from goalkit.errors import GoalkitError, RecipeError
from goalkit.relabel.search import match_radius, search_space

#: States per range-search batch (fixed, so results never depend on chunking).
MATCH_BATCH = 65536
KEY = "relabel.library"


def read_targets(path, goal_map, goal_dtype) -> np.ndarray:
    """Read the library file and return the targets as stored goal values (float64 (L, G)).

    Parameters
    ----------
    path : str or Path
    goal_map : GoalMap
        The recipe's goal map; frames are mapped through it when it is a frame embedding.
    goal_dtype : numpy dtype
        Storage precision of goals; targets are cast to it (rewards recompute from stored goals).

    Raises
    ------
    RecipeError
        Missing or unreadable file, no usable array, wrong width, frames without a frame
        embedding, non-finite values; naming the file and the key ``relabel.library``.
    """
    path = Path(path)
    if not path.is_file():
        raise RecipeError("no such goal library file", file=str(path), key=KEY)
    try:
        data = np.load(path, allow_pickle=False)
        if isinstance(data, np.ndarray):
            arr = np.asarray(data)
        else:
            with data:
                names = list(data.keys())
                if "targets" in names:
                    arr = data["targets"]
                elif len(names) == 1:
                    arr = data[names[0]]
                else:
                    raise RecipeError(f"expected one array, or an array named 'targets', in the .npz; got "
                                      f"{', '.join(names) or 'none'}", file=str(path), key=KEY)
    except RecipeError:
        raise
    except (OSError, ValueError, EOFError) as exc:
        raise RecipeError(f"cannot read the goal library as .npy/.npz ({exc})", file=str(path), key=KEY) from None
    if isinstance(arr, np.memmap) or not isinstance(arr, np.ndarray):
        arr = np.asarray(arr)
    dim = goal_map.dim
    frames = getattr(goal_map, "input", None) == "frame"
    if arr.ndim == 2 and not (frames and arr.dtype == np.uint8):
        if arr.shape[1] != dim:
            raise RecipeError(f"expected goal vectors of width {dim} (the goal map's), got shape {arr.shape}",
                              file=str(path), key=KEY)
        if not (np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)):
            raise RecipeError(f"expected real-valued goal vectors, got dtype {arr.dtype}", file=str(path), key=KEY)
        values = arr.astype(np.float64)
    elif frames and arr.ndim in (3, 4):
        try:
            values = goal_map.embedding.transform(arr)
        except GoalkitError as exc:
            raise RecipeError(f"the library's frames do not fit the frame embedding: {exc.message}",
                              file=str(path), key=KEY) from None
    else:
        want = "(L, H, W[, C]) uint8 camera frames or " if frames else ""
        raise RecipeError(f"expected {want}goal vectors (L, {dim}), got shape {arr.shape}", file=str(path), key=KEY)
    if values.shape[0] < 1:
        raise RecipeError("expected at least one target, the library is empty", file=str(path), key=KEY)
    values = np.asarray(values, dtype=goal_dtype).astype(np.float64)
    bad = ~np.isfinite(values).all(axis=1)
    if bad.any():
        raise RecipeError(f"expected finite targets, target {int(np.flatnonzero(bad)[0])} is not "
                          f"(after the cast to {np.dtype(goal_dtype).name})", file=str(path), key=KEY)
    return values


class Library:
    """Targets and where the logs reach them (picklable).

    Attributes
    ----------
    file : str
    targets : ndarray of float64 (L, G)
        Stored goal values of the targets.
    episode_ids : ndarray of int64
        Kept episodes, ascending.
    match_offsets : ndarray of int64 (E + 1,)
        Matches of kept episode ``p`` are ``match_step[match_offsets[p]:match_offsets[p + 1]]``.
    match_step, match_target : ndarray of int64
        Step ``j`` of the matched state and the target index, sorted by (episode, step, target).
    counts : ndarray of int64 (L,)
        Matched states per target.
    """

    def __init__(self, file, targets, episode_ids, match_offsets, match_step, match_target):
        self.file = str(file)
        self.targets = targets
        self.episode_ids = np.asarray(episode_ids, dtype=np.int64)
        self.match_offsets = match_offsets
        self.match_step = match_step
        self.match_target = match_target
        self.counts = np.bincount(match_target, minlength=len(targets)).astype(np.int64)
        span = int(match_step.max()) + 2 if len(match_step) else 1
        self._span = span
        pos = np.repeat(np.arange(len(self.episode_ids), dtype=np.int64), np.diff(match_offsets))
        self._keys = pos * span + match_step

    @property
    def dim(self) -> int:
        return int(self.targets.shape[1])

    def later_matches(self, episode_ids, steps) -> tuple[np.ndarray, np.ndarray]:
        """First match index after step ``t`` and the number of such matches, per (episode, t)."""
        pos = np.searchsorted(self.episode_ids, np.asarray(episode_ids, dtype=np.int64))
        t = np.minimum(np.asarray(steps, dtype=np.int64), self._span - 1)
        first = np.searchsorted(self._keys, pos * self._span + t, side="right")
        return first, self.match_offsets[pos + 1] - first

    def describe(self) -> dict:
        """Targets, matches per target and the targets no logged state reaches."""
        return {"file": self.file, "targets": int(len(self.targets)), "dim": self.dim,
                "matched_states": int(len(self.match_step)),
                "match_counts": self.counts.tolist(),
                "unreached": np.flatnonzero(self.counts == 0).tolist()}


def match_library(targets, goal_table, episode_ids, lengths, rule, file="") -> Library:
    """Find every kept state within the rule's threshold of each target.

    Parameters
    ----------
    targets : ndarray (L, G)
        Stored goal values of the targets.
    goal_table : ndarray (S, G)
        phi of every kept state, global state-row order.
    episode_ids, lengths : array_like of int
        Kept episodes and transition counts.
    rule : RewardRule
    file : str
        The library file (for the report).

    Returns
    -------
    Library
    """
    import faiss

    ids = np.asarray(episode_ids, dtype=np.int64)
    lengths = np.asarray(lengths, dtype=np.int64)
    starts = np.concatenate([[0], np.cumsum(lengths + 1)]).astype(np.int64)
    tv = search_space(rule, targets)
    index = faiss.IndexFlatL2(tv.shape[1])
    index.add(tv)
    r = match_radius(rule, tv.shape[1]) * (1 + 1e-3)
    t_norm = float(np.max(np.einsum("ij,ij->i", tv, tv))) if len(tv) else 0.0
    rows_all, tgt_all = [], []
    n = int(goal_table.shape[0])
    for a in range(0, n, MATCH_BATCH):  # loop over fixed batches of states
        b = min(n, a + MATCH_BATCH)
        vals = np.asarray(goal_table[a:b], dtype=np.float64)
        sv = search_space(rule, vals)
        s_norm = float(np.max(np.einsum("ij,ij->i", sv, sv)))
        r2 = r * r + 1e-5 * (t_norm + s_norm) + 1e-12
        lims, _, found = index.range_search(sv, r2)
        state = np.repeat(np.arange(a, b, dtype=np.int64), np.diff(lims.astype(np.int64)))
        found = found.astype(np.int64)
        if len(found):
            ok = rule.reached(vals[state - a], targets[found])
            state, found = state[ok], found[ok]
            order = np.lexsort((found, state))
            rows_all.append(state[order])
            tgt_all.append(found[order])
    rows = np.concatenate(rows_all) if rows_all else np.zeros(0, np.int64)
    tgt = np.concatenate(tgt_all) if tgt_all else np.zeros(0, np.int64)
    pos = np.searchsorted(starts, rows, side="right") - 1
    step = rows - starts[pos]
    match_offsets = np.searchsorted(pos, np.arange(len(ids) + 1), side="left").astype(np.int64)
    return Library(file, targets, ids, match_offsets, step, tgt)
