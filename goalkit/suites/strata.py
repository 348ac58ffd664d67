"""Strata of a goal suite: horizon buckets, near / far goals, routes, and the seeded pick per cell.

Every candidate pair falls in exactly one cell ``(route, horizon bucket, proximity)``:

- route: ``episode`` (the pair's own held-out episode reaches the goal later), ``stitched``
  (only a path that joins several held-out episodes does), ``none`` (no path found);
- horizon bucket: steps-to-goal ``h >= 1`` cut at the edges (edges ``(4, 16)`` give ``1-4``,
  ``5-16``, ``>=17``); unreachable pairs (``h = -1``) form their own bucket ``unreachable``;
- proximity: ``near`` when the goal's distance to the nearest training goal is at most the cut,
  ``far`` otherwise.

Inside a cell, the rows kept are the ``per_cell`` with the smallest hash
``goalkit.rng.hash64(seed, episode, step, slot, stream=SUITE_STREAM)``: a pure function of the
seed and each row's address, so the choice depends neither on row order nor on the other rows.
"""

from __future__ import annotations

import numpy as np

from goalkit import rng
from goalkit.errors import GoalkitError

#: goalkit.rng stream of the suite's choices (a number of its own: goalkit.rng.STREAMS uses 1-9,
#: the demo simulator 1001-1005).
SUITE_STREAM = 2001
#: Route codes and names.
ROUTES = ("episode", "stitched", "none")
EPISODE, STITCHED, NONE = 0, 1, 2
#: Proximity codes and names.
PROXIMITY = ("near", "far")
#: Default horizon edges (steps-to-goal).
DEFAULT_EDGES = (4, 16, 64)


def check_edges(edges) -> tuple[int, ...]:
    """Return the horizon edges as a tuple of increasing positive integers.

    Raises
    ------
    GoalkitError
        When an edge is not a whole number >= 1 or the edges do not increase.
    """
    out = []
    for e in edges:
        if isinstance(e, bool) or not float(e).is_integer() or int(e) < 1:
            raise GoalkitError(f"expected horizon edges as whole numbers >= 1, got {e!r}", key="--horizon-edges")
        out.append(int(e))
    if not out or any(b <= a for a, b in zip(out, out[1:])):
        raise GoalkitError(f"expected at least one horizon edge, strictly increasing, got {list(edges)}",
                           key="--horizon-edges")
    return tuple(out)


def bucket_names(edges) -> list[str]:
    """Names of the horizon buckets for ``edges``, the unreachable bucket last.

    Examples
    --------
    >>> bucket_names((4, 16))
    ['1-4', '5-16', '>=17', 'unreachable']
    """
    edges = check_edges(edges)
    names, low = [], 1
    for e in edges:
        names.append(f"{low}-{e}" if e > low else f"{e}")
        low = e + 1
    return names + [f">={low}", "unreachable"]


def horizon_bucket(horizon, edges) -> np.ndarray:
    """Bucket index of each horizon (int16): ``searchsorted`` on the edges, -1 -> the last bucket.

    Raises
    ------
    GoalkitError
        When a horizon is 0 or below -1 (a reachable goal is at least one step away).
    """
    edges = np.asarray(check_edges(edges), dtype=np.int64)
    h = np.asarray(horizon, dtype=np.int64)
    bad = (h == 0) | (h < -1)
    if bad.any():
        raise GoalkitError(f"expected horizons >= 1 or -1 (unreachable), got {int(h[bad][0])}")
    out = np.searchsorted(edges, h, side="left").astype(np.int16)
    out[h == -1] = len(edges) + 1
    return out


def proximity(distance, cut: float) -> np.ndarray:
    """0 (near) where ``distance <= cut``, else 1 (far), as uint8."""
    d = np.asarray(distance, dtype=np.float64)
    return (~(d <= cut)).astype(np.uint8)


def cell_of(route, bucket, prox, n_buckets: int) -> np.ndarray:
    """One int64 cell id per row from its route, horizon bucket and proximity."""
    return (np.asarray(route, np.int64) * n_buckets + np.asarray(bucket, np.int64)) * 2 + np.asarray(prox, np.int64)


def pick_per_cell(cell, episode, step, slot, *, per_cell: int, seed: int) -> np.ndarray:
    """Row indices kept: in each cell the ``per_cell`` rows with the smallest address hash.

    Parameters
    ----------
    cell : array of int
        Cell id per candidate row.
    episode, step, slot : array of int
        The row's address (source episode, step, goal slot).
    per_cell : int
        Rows kept per cell at most.
    seed : int
        Seed of the hash.

    Returns
    -------
    ndarray of int64
        Sorted indices of the kept rows.
    """
    if per_cell < 1:
        raise GoalkitError(f"expected rows per cell >= 1, got {per_cell}", key="--per-cell")
    cell = np.asarray(cell, dtype=np.int64)
    if cell.size == 0:
        return np.zeros(0, dtype=np.int64)
    key = rng.hash64(seed, np.asarray(episode, np.int64), np.asarray(step, np.int64), np.asarray(slot, np.int64),
                     stream=SUITE_STREAM)
    order = np.lexsort((np.arange(cell.size), key, cell))
    sorted_cell = cell[order]
    starts = np.flatnonzero(np.r_[True, sorted_cell[1:] != sorted_cell[:-1]])
    rank = np.arange(cell.size) - np.repeat(starts, np.diff(np.r_[starts, cell.size]))
    return np.sort(order[rank < per_cell])
