"""Bootstrap resamples of ``max-f1`` and ``youden`` evaluated over segments of the sorted pairs.

The dense evaluation (:func:`goalkit.thresholds.bootstrap.dense_thresholds`) gives every
resample a weight per sorted pair and two cumulative sums over all pairs: resamples times
pairs of work, whatever the data. For the choosers ``max-f1`` and ``youden`` far less is
needed, and the result is the same number for every resample.

Candidates (distinct distances, ascending) are *pure positive* (all their pairs labelled 1),
*pure negative* (all 0) or *mixed*. Segments are maximal runs of pure positive candidates,
maximal runs of pure negative candidates, and each mixed candidate on its own. Within a
resample, with ``P`` reached and ``N`` not-reached pairs drawn (weights >= 0):

* across a pure positive candidate with weight ``w > 0`` TP grows by ``w`` and FP stays, so
  F1 = 2TP / (TP + FP + P) and J = TP/P - FP/N strictly grow (``P > 0``, resp. ``N > 0``, as
  the choice needs); within a run of them the best is the last one with weight;
* across a pure negative candidate with weight FP grows and TP stays, so F1 and J strictly
  fall: it is never the first maximum when a candidate with weight comes before it; when
  none does, TP = 0 there, so F1 = 0 < F1 of the last candidate (2P / (2P + N)) and
  J < 0 = J of the last candidate.

So the first maximum over candidates is the first maximum over the segment ends of positive
and mixed segments that have weight in the resample; the counts there come from per-segment
sums ``counts (B, G) @ S (G, segments)``, a sparse product whose size is the number of
distinct (segment, episode) pairs, then cumulative sums over segments. The candidate inside a
chosen positive segment (its last one with weight) and the next candidate with weight (for
the midpoint placement) are found by short vectorised scans from the segment's ends. The
float values compared are those of the dense path (the same integer counts through the same
formulas), and distinct rationals of these sizes stay distinct in float64, so the choice, and
the placed threshold, are the dense path's bit for bit (tests/thresholds/test_tune_segments.py
checks it against the per-resample computation and scikit-learn).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from goalkit.thresholds.metrics import choose_index, place_values

#: Choosers this evaluation serves.
SEGMENT_CHOOSERS = ("max-f1", "youden")
#: First window of the scans for a candidate with weight (doubled until found).
SCAN = 32


class SegmentedPairs:
    """Sorted labelled pairs cut into segments, ready to evaluate blocks of resamples.

    Parameters
    ----------
    ys : ndarray of int64 (M,)
        Labels of the pairs in ascending distance order.
    gs : ndarray of int64 (M,)
        Group position (0 .. G-1) of each sorted pair.
    ends : ndarray of int64 (K,)
        Last sorted pair of each candidate.
    n_groups : int
    """

    def __init__(self, ys, gs, ends, n_groups: int):
        self.gs = np.asarray(gs, dtype=np.int64)
        self.ends = np.asarray(ends, dtype=np.int64)
        self.n_groups = int(n_groups)
        k = self.ends.size
        m = self.gs.size
        starts = np.r_[0, self.ends[:-1] + 1]
        npos = np.add.reduceat(np.asarray(ys, dtype=np.int64), starts)
        size = self.ends - starts + 1
        kind = np.where(npos == size, 1, np.where(npos == 0, 0, 2))  # 1 positive, 0 negative, 2 mixed
        new = np.r_[True, (kind[1:] != kind[:-1]) | (kind[1:] == 2)]
        seg_of_cand = np.cumsum(new) - 1
        n_seg = int(seg_of_cand[-1]) + 1
        first_cand = np.flatnonzero(new)
        last_cand = np.r_[first_cand[1:] - 1, k - 1]
        self.kind = kind[first_cand]                       # per segment
        self.seg_first_pair = starts[first_cand]
        self.seg_last_pair = self.ends[last_cand]
        self.cand_of_pair = np.repeat(np.arange(k, dtype=np.int64), size)
        seg_of_pair = seg_of_cand[self.cand_of_pair]
        ys = np.asarray(ys, dtype=np.int64)
        shape = (self.n_groups, n_seg)
        # pairs per (group, segment), all and reached: duplicates are summed by the conversion
        self.all_ = sp.csr_array((np.ones(m, np.int64), (self.gs, seg_of_pair)), shape=shape)
        self.pos_ = sp.csr_array((ys, (self.gs, seg_of_pair)), shape=shape)
        self.all_.sum_duplicates()
        self.pos_.sum_duplicates()
        self.candidates = np.flatnonzero(self.kind != 0)  # segments that can hold the choice
        self.n_segments = n_seg

    @property
    def size(self) -> int:
        """Stored (group, segment) entries: the work per resample."""
        return int(self.all_.nnz)

    def block(self, counts, thresholds, chooser: str, placement: str, inclusive: bool) -> np.ndarray:
        """Chosen (placed) thresholds of the resamples whose group counts are ``counts`` (B, G)."""
        counts = np.asarray(counts, dtype=np.int64)
        b = counts.shape[0]
        c = self.candidates
        if c.size == 0:  # no reached pair at all: no choice in any resample
            return np.full(b, np.nan)
        # (segments, B) weights per segment, summed down the segments (contiguous rows), then
        # the candidate segments' rows as (B, candidates) C-ordered arrays
        seg_all = self.all_.T @ counts.T
        tot = np.cumsum(seg_all, axis=0)
        tp = np.cumsum(self.pos_.T @ counts.T, axis=0)
        n_pos, n_neg = tp[-1], tot[-1] - tp[-1]
        valid = np.ascontiguousarray((seg_all[c] > 0).T)
        tp_c = np.ascontiguousarray(tp[c].T)
        fp_c = np.ascontiguousarray(tot[c].T) - tp_c
        pick = choose_index(None, tp_c, fp_c, n_pos, n_neg, valid, chooser)
        ok = pick >= 0
        rows = np.flatnonzero(ok)
        seg = c[pick[rows]]
        cand = np.full(b, -1, np.int64)
        # the last sorted pair with weight inside the chosen segment (a mixed segment is one candidate)
        last = self._scan(counts, rows, self.seg_last_pair[seg], self.seg_first_pair[seg], -1)
        cand[rows] = self.cand_of_pair[last]
        # the next pair with weight after the chosen candidate: the next candidate with weight
        after = self.ends[cand[rows]] + 1
        nxt_pair = self._scan(counts, rows, after, np.full(rows.size, self.gs.size - 1), +1)
        k = self.ends.size
        nxt = np.full(b, k, np.int64)
        found = nxt_pair >= 0
        nxt[rows[found]] = self.cand_of_pair[nxt_pair[found]]
        th = np.asarray(thresholds, dtype=np.float64)
        safe = np.maximum(cand, 0)
        upper = th[np.minimum(nxt, k - 1)]
        return place_values(th[safe], upper, nxt < k, cand, placement, inclusive)

    def _scan(self, counts, rows, start, stop, direction: int) -> np.ndarray:
        """First sorted pair from ``start`` towards ``stop`` (inclusive) whose group has a count
        in its resample (``rows``), or -1; windows doubling in length, all rows at once."""
        out = np.full(rows.size, -1, np.int64)
        todo = np.flatnonzero((stop - start) * direction >= 0)
        width = SCAN
        pos0 = start.copy()
        while todo.size:  # a loop over doubling windows (a few rounds)
            steps = np.arange(width, dtype=np.int64)[None, :] * direction
            pos = pos0[todo, None] + steps
            inside = (stop[todo, None] - pos) * direction >= 0
            safe = np.clip(pos, 0, self.gs.size - 1)
            hit = inside & (counts[rows[todo, None], self.gs[safe]] > 0)
            any_hit = hit.any(axis=1)
            first = np.argmax(hit, axis=1)
            done = todo[any_hit]
            out[done] = pos[any_hit, first[any_hit]]
            exhausted = ~any_hit & ~inside[:, -1]
            todo_next = todo[~any_hit & ~exhausted]
            pos0[todo_next] += width * direction
            todo = todo_next
            width *= 2
        return out


__all__ = ["SegmentedPairs", "SEGMENT_CHOOSERS"]
