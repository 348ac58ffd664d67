"""Epochs over a built set: every row once, in a shuffled order, in bounded memory, by shard.

Three ways to shuffle (docs/dataset.md, "Shuffled epochs"):

* **full**: when the rows one shard needs fit in the memory budget, they are read once (every
  stored chunk decoded once) and batches are consecutive slices of a permutation of the whole
  split, so a batch's rows are a uniform draw without replacement.
* **pooled**: otherwise the split is cut into pieces (its stored chunks, or shorter pieces when
  a chunk is over a third of the budget's rows). Sorted by position, the whole pieces pair
  mirrored (first with last, second with second-to-last, ...), so every pair has the same mean
  position; the pairs, in a random order, are dealt round-robin into the fewest pools of at most
  the budget's rows, and each short piece (the split's last one, a shard's cut ones) is sliced
  among the pools in proportion to their rows. So every pool has the shard's mean position, and
  consecutive batches' mean positions are uncorrelated even when a pool holds two or three
  chunks. Rows are drawn without replacement across a pool; a batch that straddles two pools
  takes its last rows from the next one. Every chunk is decoded once, except a short piece's
  chunk, decoded once per pool; how close a batch comes to an independent draw depends on how
  many episodes a pool holds. When a shard's pieces do not pair (tight shards: a few stored
  chunks a shard), every piece is cut into ``2n`` slices and each of the ``n`` pools takes a
  mirrored two of every piece (:func:`_sliced_pools`), so pools still share the shard's mean.
* **passes**: the permutation of *full*, cut into passes of at most the budget's rows; each pass
  reads the whole split and keeps its own rows. Batches are exactly those of *full*, at the
  cost of decoding every chunk once per pass.

Sharding: an epoch is one sequence of the split's rows (the permutation, or the pieces in their
epoch order: a random order of mirrored pairs of pieces, so that a shard's pieces pair up but for
the ones at its two ends, which are sliced among its pools).
With ``count`` shards, shard ``index`` takes positions ``[index * q, (index + 1) * q)``
of it, ``q = rows // count``; the ``rows % count`` rows at the end of the sequence (different rows
each epoch) are left out of that epoch (``remainder="drop"``), or, with ``remainder="pad"``,
``q = ceil(rows / count)`` and the sequence continues from its start, so a few rows appear twice.
Shards are disjoint, equal in size, and together cover the split (less the remainder).

Every order is a pure function of (seed, epoch, shard index, shard count, batch size is not part
of it) through :func:`goalkit.rng.permutation`; the pooled order also depends on the budget's
pool size and the stored chunk length.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterator

import numpy as np

from goalkit.errors import DatasetError
from goalkit.rng import permutation

#: Bytes of decoded rows one reader (one process or data-loader worker) may hold at once.
DEFAULT_MEMORY_BUDGET = 2 * 2**30

#: Shuffle modes: False (storage order), "auto" (full when it fits, else pooled), "full", "passes",
#: "pooled".
SHUFFLE_MODES = ("auto", "full", "passes", "pooled")

# what a permutation is for (the ``step`` of its address; the epoch is its ``episode``)
_ROWS, _PIECES, _STRATUM, _POOL = 1, 2, 3, 4


@dataclass(frozen=True)
class EpochSpec:
    """One epoch of one shard.

    Parameters
    ----------
    rows : int
        Rows in the split.
    seed, epoch : int
        The order is a pure function of these (and the shard).
    index, count : int
        This shard and the number of shards (data-loader workers times processes).
    remainder : {"drop", "pad"}
        What happens to the ``rows % count`` rows that do not divide evenly (module docstring).
    """

    rows: int
    seed: int = 0
    epoch: int = 0
    index: int = 0
    count: int = 1
    remainder: str = "drop"

    def __post_init__(self):
        if self.count < 1 or not 0 <= self.index < self.count:
            raise DatasetError(f"shard index must be in 0 .. count - 1, got index {self.index} of {self.count}")
        if self.remainder not in ("drop", "pad"):
            raise DatasetError(f"remainder must be 'drop' or 'pad', got {self.remainder!r}")
        if self.seed < 0 or self.epoch < 0:
            raise DatasetError(f"seed and epoch must be non-negative, got seed {self.seed}, epoch {self.epoch}")

    @property
    def share(self) -> int:
        """Rows of this shard (the same for every shard)."""
        if self.remainder == "pad":
            return -(-self.rows // self.count)
        return self.rows // self.count

    def positions(self) -> list[tuple[int, int]]:
        """This shard's positions in the epoch's sequence, as ranges (two when padding wraps round)."""
        q = self.share
        lo, hi = self.index * q, (self.index + 1) * q
        if hi <= self.rows or self.rows == 0:
            return [(lo, min(hi, self.rows))]
        out = [(lo, self.rows)] if lo < self.rows else []
        left = hi - max(lo, self.rows)
        while left > 0:  # the sequence continues from its start
            take = min(left, self.rows)
            out.append((0, take))
            left -= take
        return out

    def perm(self, what: int, n: int, *parts: int) -> np.ndarray:
        step = what
        for p in parts:
            step = (step * 1_000_003 + int(p)) % 2**62
        return permutation(self.seed, n, episode=self.epoch, step=step)


def shard_index(rank: int = 0, world_size: int = 1, worker: int = 0, workers: int = 1) -> tuple[int, int]:
    """(index, count) of the shard read by data-loader ``worker`` of process ``rank``.

    Examples
    --------
    >>> shard_index(rank=1, world_size=2, worker=1, workers=3)
    (4, 6)
    """
    if not 0 <= rank < world_size or not 0 <= worker < workers:
        raise DatasetError(f"expected 0 <= rank < world_size and 0 <= worker < workers, got rank {rank} of "
                           f"{world_size}, worker {worker} of {workers}")
    return rank * workers + worker, world_size * workers


def full_order(spec: EpochSpec, shuffle: bool = True) -> np.ndarray:
    """Row numbers of the shard, in its epoch order (full mode, or storage order without shuffle)."""
    seq = spec.perm(_ROWS, spec.rows) if shuffle else np.arange(spec.rows, dtype=np.int64)
    return np.concatenate([seq[a:b] for a, b in spec.positions()]) if spec.rows else seq


def pooled_plan(spec: EpochSpec, piece_rows: int, pool_rows: int, shuffle: bool = True) -> list[list[tuple[int, int]]]:
    """The shard's pools: each a list of row ranges ``(a, b)`` holding at most ``pool_rows`` rows.

    Parameters
    ----------
    piece_rows : int
        Rows per piece (the stored chunk length, or less when a chunk exceeds the pool).
    pool_rows : int
        Rows one pool may hold.
    """
    pool_rows = int(pool_rows)
    piece_rows = max(1, min(int(piece_rows), pool_rows))
    if shuffle and pool_rows >= 3:
        piece_rows = min(piece_rows, pool_rows // 3)  # room for a mirrored pair and slices in a pool
    starts = np.arange(0, spec.rows, piece_rows, dtype=np.int64)
    if shuffle:
        # the epoch's sequence of pieces is a random order of mirrored pairs (piece i with piece
        # w - 1 - i of the w whole ones), the odd middle piece and the short last piece, so that a
        # shard's share of it is made of whole pairs but for the pieces at its two ends
        w = spec.rows // piece_rows
        units = [[i, w - 1 - i] for i in range(w // 2)] + [[w // 2]] * (w % 2) + [[w]] * (len(starts) > w)
        order = np.array([i for u in spec.perm(_PIECES, len(units)).tolist() for i in units[u]], dtype=np.int64)
    else:
        order = np.arange(len(starts))
    lens = np.minimum(starts + piece_rows, spec.rows) - starts
    seq_starts = np.cumsum(lens[order]) - lens[order]   # position of each ordered piece in the sequence
    segments = []
    for lo, hi in spec.positions():
        first = int(np.searchsorted(seq_starts, lo, side="right")) - 1
        for k in range(max(first, 0), len(order)):
            s = int(seq_starts[k])
            if s >= hi:
                break
            a, b = max(lo, s), min(hi, s + int(lens[order[k]]))
            base = int(starts[order[k]]) - s
            segments.append((a + base, b + base))
    if not segments:
        return []
    per_pool = max(1, pool_rows // piece_rows)
    if not shuffle:
        n_pools = -(-len(segments) // per_pool)
        return [segments[p * per_pool:(p + 1) * per_pool] for p in range(n_pools)]
    return _mirrored_pools(spec, sorted(segments), piece_rows, pool_rows) or _sliced_pools(sorted(segments), pool_rows)


#: Pool counts tried by :func:`_mirrored_pools` and :func:`_sliced_pools` above the fewest that
#: could hold the rows, and the most slice edges the latter computes for one try; past either,
#: the shard has too many pieces for its pool size (pools of a few rows) and the next way is
#: taken, at last :func:`_paired_pools`.
SLICE_TRIES = 16
SLICE_VALUES = 250_000


def _sliced_pools(segments, pool_rows):
    """Pools that each hold a mirrored share of every segment (when whole pieces cannot pair).

    With ``n`` pools, each segment is cut into ``2n`` near-equal slices and pool ``p`` takes
    slices ``p`` and ``2n - 1 - p``: symmetric about the segment's middle, so every pool has the
    shard's mean position and spans all of its segments (a shard that holds only a few stored
    chunks of a tight split still mixes all of them in every pool). ``n`` is the fewest pools of
    at most ``pool_rows`` rows; each touched chunk is decoded once per pool, so about
    ``rows / pool_rows + 1`` times an epoch, which is small exactly when this plan is used.
    """
    total = sum(b - a for a, b in segments)
    starts = np.array([a for a, _ in segments], dtype=np.int64)[:, None]
    lengths = np.array([b - a for a, b in segments], dtype=np.int64)[:, None]
    first = max(1, -(-total // pool_rows))
    for n in range(first, min(total, first + SLICE_TRIES) + 1):
        if len(segments) * (2 * n + 1) > SLICE_VALUES:
            break
        edges = starts + (np.arange(2 * n + 1, dtype=np.int64) * lengths) // (2 * n)   # (segments, 2n + 1)
        sizes = np.diff(edges, axis=1).sum(axis=0)                                   # rows of each slice index
        if (sizes[:n] + sizes[2 * n - 1:n - 1:-1]).max() <= pool_rows:               # pool p: slices p, 2n-1-p
            pools = [[] for _ in range(n)]
            for row in edges.tolist():
                for p in range(n):
                    for k in (p, 2 * n - 1 - p):
                        if row[k + 1] > row[k]:
                            pools[p].append((row[k], row[k + 1]))
            return [_merge(p) for p in pools if p]
    return _paired_pools(segments, pool_rows)


def _paired_pools(segments, pool_rows):
    """Pools for a shard with too many segments for every pool to hold a slice of each (a pool of
    a few rows): segment ``i`` paired with its mirror ``S - 1 - i`` (so a pool's mean position is
    near the shard's), the pairs packed in order into pools of at most ``pool_rows`` rows."""
    pools, rows = [], pool_rows
    s = len(segments)
    for i in range((s + 1) // 2):
        pair = [segments[i]] if i == s - 1 - i else [segments[i], segments[s - 1 - i]]
        size = sum(b - a for a, b in pair)
        if size > pool_rows:                 # each segment alone fits (pieces are at most a pool)
            pools += [[seg] for seg in pair]
            rows = pool_rows
            continue
        if rows + size > pool_rows:
            pools.append([])
            rows = 0
        pools[-1] += pair
        rows += size
    return [_merge(p) for p in pools]


def _merge(ranges):
    """Sorted ranges with touching ones joined (the middle two slices of a segment are adjacent)."""
    out = []
    for a, b in sorted(ranges):
        if out and out[-1][1] == a:
            out[-1] = (out[-1][0], b)
        else:
            out.append((a, b))
    return out


def _mirrored_pools(spec, segments, piece_rows, pool_rows):
    """Pools whose mean positions are all the same (empty when they cannot fit ``pool_rows``).

    Sorted by position, the whole pieces pair mirrored (the i-th from the start with the i-th from
    the end; an odd one in the middle stays alone): every pair's mean position is the same. The
    pairs, in a random order, are dealt round-robin to the fewest pools that hold them, and every
    short segment (the split's last piece, a shard's cut pieces) is sliced among the pools in
    proportion to their whole rows, so every pool has the same mean position as the whole shard
    (exactly when the shard is the whole split), and consecutive batches' mean positions are
    uncorrelated across a change of pool. A short segment is read once per pool (its chunk
    decoded once per pool); every other chunk once per epoch.
    """
    w = spec.rows // piece_rows
    whole = {seg[0] // piece_rows for seg in segments if seg[1] - seg[0] == piece_rows}
    units = [[(i * piece_rows, (i + 1) * piece_rows), ((w - 1 - i) * piece_rows, (w - i) * piece_rows)]
             for i in sorted(whole) if i < w - 1 - i and w - 1 - i in whole]
    units = [units[i] for i in spec.perm(_STRATUM, len(units), spec.index, spec.count).tolist()]
    if w % 2 and w // 2 in whole:
        units.append([(w // 2 * piece_rows, (w // 2 + 1) * piece_rows)])
    paired = {seg for u in units for seg in u}
    short = [seg for seg in segments if seg not in paired]  # short pieces and whole ones without their mirror
    if not units:
        return []
    whole_rows = sum(b - a for u in units for a, b in u)
    first = max(1, -(-len(units) * 2 * piece_rows // pool_rows))
    for n in range(first, min(len(units), first + SLICE_TRIES) + 1):
        pools = [[seg for u in units[p::n] for seg in u] for p in range(n)]
        mass = np.array([sum(b - a for a, b in p) for p in pools], dtype=np.int64)
        # each short segment's rows cut at the pools' cumulative shares of the whole rows
        cuts = np.concatenate([[0], np.cumsum(mass)]) / whole_rows
        extra = np.zeros(n, dtype=np.int64)
        slices = [[] for _ in range(n)]
        for a, b in short:
            edges = a + np.round(cuts * (b - a)).astype(np.int64)
            for p in range(n):
                if edges[p + 1] > edges[p]:
                    slices[p].append((int(edges[p]), int(edges[p + 1])))
                    extra[p] += edges[p + 1] - edges[p]
        if int((mass + extra).max()) <= pool_rows:
            return [sorted(pools[p] + slices[p]) for p in range(n)]
    return []


def iter_batches(reader, spec: EpochSpec, batch_size: int, shuffle, memory_budget: int | None = None,
                 drop_last: bool = False, row_numbers: bool = False) -> Iterator[dict]:
    """Batches of one epoch of one shard.

    Parameters
    ----------
    reader : goalkit.write.chunkread.SplitColumns
    spec : EpochSpec
    batch_size : int
    shuffle : bool or {"auto", "full", "passes", "pooled"}
        ``True`` means ``"auto"``.
    memory_budget : int, optional
        Bytes of decoded rows held at once (default :data:`DEFAULT_MEMORY_BUDGET`).
    drop_last : bool
        Leave out the last batch when it is short.
    row_numbers : bool
        Add ``"row"``: each row's number in the split.
    """
    if shuffle is True:
        shuffle = "auto"
    if shuffle not in (False, *SHUFFLE_MODES):
        raise DatasetError(f"shuffle must be False, True or one of {', '.join(SHUFFLE_MODES)}; got {shuffle!r}")
    if batch_size < 1:
        raise DatasetError(f"batch_size must be at least 1, got {batch_size}")
    budget = DEFAULT_MEMORY_BUDGET if memory_budget is None else int(memory_budget)
    if budget < 1:
        raise DatasetError(f"memory_budget must be a positive number of bytes, got {memory_budget}")
    row_bytes = reader.row_bytes()
    pool_rows = max(batch_size, budget // row_bytes)
    if shuffle == "full" or (shuffle == "auto" and spec.share <= pool_rows):
        yield from _full_batches(reader, spec, batch_size, drop_last, row_numbers, spec.share)
        return
    if shuffle == "passes":
        yield from _full_batches(reader, spec, batch_size, drop_last, row_numbers, pool_rows)
        return
    plan = pooled_plan(spec, reader.chunk_rows, pool_rows, shuffle=bool(shuffle))
    yield from _pooled_batches(reader, spec, plan, batch_size, bool(shuffle), drop_last, row_numbers)


def _full_batches(reader, spec, batch_size, drop_last, row_numbers, pass_rows):
    if spec.count == 1 and pass_rows >= spec.rows:
        # the whole split, each chunk decoded once on threads while the order is drawn; a batch
        # gathers its rows (faster than scattering the split into the order while decoding)
        started = reader.start([(0, spec.rows)])
        order = full_order(spec)
        data = reader.finish(started)
        for b in range(0, len(order), batch_size):
            idx = order[b:b + batch_size]
            if drop_last and len(idx) < batch_size:
                return
            batch = {k: v[idx] for k, v in data.items()}
            if row_numbers:
                batch["row"] = idx
            yield batch
        return
    order = full_order(spec)
    if pass_rows < len(order):
        pass_rows = max(batch_size, pass_rows // batch_size * batch_size)  # whole batches in a pass
    for p0 in range(0, max(len(order), 1), max(pass_rows, 1)):
        part = order[p0:p0 + pass_rows]
        data, local = _gather(reader, part)
        for b in range(0, len(part), batch_size):
            if drop_last and b + batch_size > len(part):
                return
            batch = {k: v[local[b:b + batch_size]] for k, v in data.items()}
            if row_numbers:
                batch["row"] = part[b:b + batch_size]
            yield batch


def _gather(reader, rows):
    """The given rows (any order, repeats allowed), reading the split chunk by chunk (each decoded once)."""
    need = np.unique(rows)
    local = np.searchsorted(need, rows)
    step = reader.chunk_rows * max(1, 4 * 2**20 // (reader.chunk_rows * reader.row_bytes()))  # about 4 MiB a read
    parts = []
    for a in range(int(need[0]) - int(need[0]) % step if len(need) else 0, int(need[-1]) + 1 if len(need) else 0, step):
        i0, i1 = np.searchsorted(need, [a, a + step])
        if i1 > i0:
            block = reader.read(a, a + step)
            parts.append({k: v[need[i0:i1] - a] for k, v in block.items()})
    data = {k: np.concatenate([p[k] for p in parts]) for k in reader.names} if parts else reader.read(0, 0)
    return data, local


def _pooled_batches(reader, spec, plan, batch_size, shuffle, drop_last, row_numbers):
    pending = None  # the first rows of a batch that straddles two pools
    for p, ranges in enumerate(plan):
        data = reader.read_ranges(ranges)
        if row_numbers:
            data["row"] = np.concatenate([np.arange(a, b, dtype=np.int64) for a, b in ranges])
        n = sum(b - a for a, b in ranges)
        # rows drawn without replacement across the pool
        perm = spec.perm(_POOL, n, spec.index, spec.count, p) if shuffle else np.arange(n)
        at = 0
        if pending is not None:
            have = len(next(iter(pending.values())))
            take = perm[:batch_size - have]
            pending = {k: np.concatenate([pending[k], v[take]]) for k, v in data.items()}
            at = len(take)
            if have + at < batch_size:
                continue
            yield pending
            pending = None
        while at < n:
            idx = perm[at:at + batch_size]
            at += len(idx)
            batch = {k: v[idx] for k, v in data.items()}
            if len(idx) < batch_size:
                pending = batch
                break
            yield batch
    if pending is not None and not drop_last:
        yield pending
