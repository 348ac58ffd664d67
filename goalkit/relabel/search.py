"""Neighbour search for the ``neighbour`` and ``near_miss`` strategies: one faiss index per split.

:func:`build_goal_search` indexes the goal vectors of every kept state of each split (once, in
the build plan) and tunes the index to the recall the recipe asks for. A strategy then asks,
for one whole episode at a time, for the ``k`` nearest states of **other episodes of the same
split** to each of its states (:meth:`GoalSearch.candidates`).

Search space
------------
The index holds the goal vectors scaled the way the reward rule weighs them
(:func:`search_space`): ``sqrt(w)`` for a weighted Euclidean or cosine rule, ``w`` for l1 and
chebyshev, ``1 / tol`` for ``box``, unit length for cosine. Euclidean distance there is the
rule's distance (euclidean), or bounds it (l1 >= it, chebyshev >= it / sqrt(G), box likewise,
cosine = its square / 2), so "nearest" means nearest under the rule.

Own episode
-----------
The nearest states of a logged state are mostly its own trajectory. The index is searched
with ``k + min(T + 1, 1024)`` results (``T + 1`` states of the own episode), own-episode results
are dropped, and queries left with fewer than ``k`` results are searched again with twice the
depth, up to 4096; any still short are answered by exhaustive search (exact, in blocks).
Near misses are ranked by the rule's own distance; the search goes deeper until no state
beyond the fetched depth can be nearer under the rule (:meth:`GoalSearch.rule_lower_bound`),
so with exact search they are the rule's true nearest (up to depth 4096, then as found).

Determinism
-----------
The answer for an episode's states depends only on the index and that episode: every query
batch is one whole episode (in fixed blocks of 2048 states for long ones; a fixed sample for
calibration), never a mix that depends on chunking, so float32 near-ties inside faiss resolve the same way in every build.

Recall
------
Filtered recall@k (own episode excluded) is what matters here, and self-queries of an
unfiltered index are optimistic (their neighbours sit in their own IVF list), so after
:func:`~goalkit.goals.neighbours.build_index` the breadth is tuned again on the filtered task:
``recall_queries`` states of the split (chosen by :mod:`goalkit.rng`), the exact filtered top-k
from exhaustive search as reference, doubling then bisecting the breadth until the recall minus
``confidence_z`` standard errors reaches the target. The reached value is in :meth:`describe`.
"""

from __future__ import annotations

import numpy as np

from goalkit.errors import RecipeError
from goalkit.goals.neighbours import IndexSettings, build_index, lower_bound, sample_rows, smallest_breadth
from goalkit.rows import SPLITS

#: First search depth beyond k is k + min(T + 1, FIRST_EXTRA); depth doubles up to DEPTH_CAP.
FIRST_EXTRA = 1024
DEPTH_CAP = 4096
#: States of one episode searched per call (fixed blocks of the episode: memory stays bounded
#: for long episodes and the answers still depend on the episode only).
EPISODE_BLOCK = 2048
#: Exhaustive search blocks (queries x database rows).
QUERY_BLOCK = 8
DB_BLOCK = 32768
SPLIT_NAMES = SPLITS  # split code -> name


def search_space(rule, values) -> np.ndarray:
    """Goal vectors scaled so that Euclidean distance follows ``rule`` (float32, C order).

    Parameters
    ----------
    rule : goalkit.reward.RewardRule
    values : array_like, shape (N, G)

    Returns
    -------
    ndarray of float32, shape (N, G)
    """
    v = np.asarray(values, dtype=np.float64)
    kind = rule.distance_name
    if kind == "box":
        v = v / np.asarray(rule.threshold, dtype=np.float64)
    else:
        if rule.weights is not None:
            w = np.asarray(rule.weights, dtype=np.float64)
            v = v * (np.sqrt(w) if kind in ("euclidean", "cosine") else w)
        if kind == "cosine":
            norm = np.linalg.norm(v, axis=1, keepdims=True)
            v = np.divide(v, norm, out=np.zeros_like(v), where=norm > 0)
    return np.ascontiguousarray(v, dtype=np.float32)


def match_radius(rule, dim: int) -> float:
    """Euclidean radius in :func:`search_space` that contains every state the rule calls reached.

    euclidean and l1: the threshold; chebyshev: ``threshold * sqrt(G)``; box: ``sqrt(G)``;
    cosine: ``sqrt(2 * threshold)`` (unit vectors: ``|a - g|**2 = 2 (1 - cos)``).
    """
    kind = rule.distance_name
    if kind == "box":
        return float(np.sqrt(dim))
    thr = float(rule.threshold)
    if kind == "chebyshev":
        return thr * float(np.sqrt(dim))
    if kind == "cosine":
        return float(np.sqrt(2.0 * max(thr, 0.0)))
    return thr


class SplitSearch:
    """The index and the state layout of one split (picklable).

    Attributes
    ----------
    code : int
        Split code (0 train, 1 validation).
    episode_ids, lengths : ndarray of int64
        The split's kept episodes (ascending) and their transition counts.
    state_offsets : ndarray of int64
        ``E + 1`` offsets of each episode's states in :attr:`values`.
    values : ndarray (n, G)
        Goal vectors of the split's states, in the stored goal precision.
    vectors : ndarray of float32 (n, G)
        The same in the search space.
    index : NeighbourIndex
    """

    def __init__(self, code, episode_ids, lengths, values, vectors, index):
        self.code = int(code)
        self.episode_ids = np.asarray(episode_ids, dtype=np.int64)
        self.lengths = np.asarray(lengths, dtype=np.int64)
        self.state_offsets = np.concatenate([[0], np.cumsum(self.lengths + 1)]).astype(np.int64)
        self.values = values
        self.vectors = vectors
        self.index = index
        self.report_extra: dict = {}

    def __len__(self) -> int:
        return int(self.state_offsets[-1])

    def owner(self, positions) -> np.ndarray:
        """Episode position (in this split) of each state position."""
        return np.searchsorted(self.state_offsets, positions, side="right") - 1


class GoalSearch:
    """Per-split neighbour indexes and the filtered searches the strategies need.

    Create with :func:`build_goal_search`. Picklable (faiss indexes travel serialised).

    Attributes
    ----------
    splits : dict of int to SplitSearch
    rule : RewardRule
    k : int
        Neighbours kept per state (the ``[relabel] neighbours`` key).
    settings : IndexSettings
    """

    def __init__(self, splits: dict, rule, k: int, settings: IndexSettings, dim: int = 1):
        self.dim = int(dim)
        self.splits = splits
        self.rule = rule
        self.k = int(k)
        self.settings = settings

    # ---- lookups -----------------------------------------------------------------------
    def _where(self, episode_id: int) -> tuple[SplitSearch, int]:
        for sp in self.splits.values():
            p = int(np.searchsorted(sp.episode_ids, episode_id))
            if p < len(sp.episode_ids) and sp.episode_ids[p] == episode_id:
                return sp, p
        raise ValueError(f"episode {episode_id} is not indexed")

    def lengths_of(self, episode_ids) -> np.ndarray:
        """Transition counts of indexed episode ids."""
        episode_ids = np.asarray(episode_ids, dtype=np.int64)
        out = np.full(episode_ids.shape, -1, np.int64)
        for sp in self.splits.values():
            p = np.minimum(np.searchsorted(sp.episode_ids, episode_ids), len(sp.episode_ids) - 1)
            hit = sp.episode_ids[p] == episode_ids
            out[hit] = sp.lengths[p[hit]]
        return out

    def candidates(self, kind: str, episode_id: int):
        """The ``k`` nearest other-episode states of every state of one episode.

        Parameters
        ----------
        kind : {"neighbour", "near_miss"}
            ``near_miss`` keeps only states the rule does not call reached from the query
            state (distance beyond the threshold), ordered by the rule's distance.
        episode_id : int

        Returns
        -------
        (episodes, steps, counts)
            int64 arrays ``(T + 1, k)``, ``(T + 1, k)`` and ``(T + 1,)``: candidate ``c`` of
            state ``j`` is state ``steps[j, c]`` of episode ``episodes[j, c]`` for
            ``c < counts[j]`` (nearest first), -1 beyond.
        """
        sp, p = self._where(int(episode_id))
        a, b = int(sp.state_offsets[p]), int(sp.state_offsets[p + 1])
        parts = []
        for s in range(a, b, EPISODE_BLOCK):  # loop over blocks of the episode's states
            q = np.arange(s, min(b, s + EPISODE_BLOCK), dtype=np.int64)
            parts.append(self._filtered(sp, sp.index, q, np.full(len(q), a), np.full(len(q), b),
                                        kind == "near_miss"))
        ids = np.concatenate([p_[0] for p_ in parts])
        cnt = np.concatenate([p_[2] for p_ in parts])
        own = sp.owner(np.maximum(ids, 0))
        eps = np.where(ids >= 0, sp.episode_ids[own], -1)
        steps = np.where(ids >= 0, ids - sp.state_offsets[own], -1)
        return eps, steps, cnt

    # ---- search ------------------------------------------------------------------------
    def _rule_distance(self, sp, q, ids) -> np.ndarray:
        m, K = ids.shape
        a = np.repeat(np.asarray(sp.values[q], dtype=np.float64), K, axis=0)
        g = np.asarray(sp.values[np.maximum(ids, 0).reshape(-1)], dtype=np.float64)
        return self.rule.distance(a, g).reshape(m, K)

    def _select(self, sp, q, ids, d, lo, hi, beyond):
        """First k usable results per row: (ids, keys, counts), nearest first."""
        ok = (ids >= 0) & ((ids < lo[:, None]) | (ids >= hi[:, None]))
        key = d
        if beyond:
            key = self._rule_distance(sp, q, ids)
            ok &= ~self.rule.reached_from(key)
        key = np.where(ok, key, np.inf)
        order = np.argsort(key, axis=1, kind="stable")[:, :self.k]
        sel = np.take_along_axis(ids, order, axis=1)
        skey = np.take_along_axis(key, order, axis=1)
        got = np.isfinite(skey)
        sel = np.where(got, sel, -1)
        if sel.shape[1] < self.k:
            pad = self.k - sel.shape[1]
            sel = np.pad(sel, ((0, 0), (0, pad)), constant_values=-1)
            skey = np.pad(skey, ((0, 0), (0, pad)), constant_values=np.inf)
            got = np.pad(got, ((0, 0), (0, pad)))
        return sel, skey, got.sum(axis=1)

    def _filtered(self, sp, index, q, lo, hi, beyond):
        """Filtered k-NN of state positions ``q`` (own ranges ``[lo, hi)`` excluded)."""
        m, n, k = len(q), len(sp), self.k
        out = np.full((m, k), -1, np.int64)
        outk = np.full((m, k), np.inf)
        cnt = np.zeros(m, np.int64)
        if m == 0:
            return out, outk, cnt
        todo = np.arange(m)
        depth = k + min(int((hi - lo).max()), FIRST_EXTRA)
        while todo.size:
            kk = min(depth, n)
            d, ids = index.search(sp.vectors[q[todo]], kk)
            sel, skey, c = self._select(sp, q[todo], ids, d, lo[todo], hi[todo], beyond)
            full = c >= k
            if beyond:  # no unfetched state can be nearer under the rule than the k-th found
                reach = np.max(np.where(np.isfinite(d), d, 0.0), axis=1)
                full &= self.rule_lower_bound(reach) >= skey[:, k - 1]
            ran_out = (ids < 0).any(axis=1)  # an approximate index returned fewer than asked
            at_cap = depth >= DEPTH_CAP or kk >= n
            if kk >= n and index.report.method == "exact":
                done = np.ones(len(todo), bool)
            else:
                done = full | ((c >= k) & (ran_out | at_cap))
            out[todo[done]], outk[todo[done]], cnt[todo[done]] = sel[done], skey[done], c[done]
            exhaust = ~done & (ran_out | at_cap)
            if exhaust.any():
                rows = todo[exhaust]
                e_ids, e_key, e_cnt = self._exhaustive(sp, q[rows], lo[rows], hi[rows], beyond)
                out[rows], outk[rows], cnt[rows] = e_ids, e_key, e_cnt
            todo = todo[~done & ~exhaust]
            depth *= 2
        return out, outk, cnt

    def rule_lower_bound(self, d) -> np.ndarray:
        """Smallest rule distance of two states ``d`` apart in the search space.

        euclidean, l1: ``d``; chebyshev, box: ``d / sqrt(G)``; cosine: ``d**2 / 2``.
        """
        d = np.asarray(d, dtype=np.float64)
        kind = self.rule.distance_name
        dim = self.dim
        if kind in ("chebyshev", "box"):
            return d / np.sqrt(dim)
        if kind == "cosine":
            return d * d / 2.0
        return d

    def _exhaustive(self, sp, q, lo, hi, beyond):
        """Exact filtered top-k against every state of the split, in blocks."""
        m, n, k = len(q), len(sp), self.k
        out = np.full((m, k), -1, np.int64)
        outk = np.full((m, k), np.inf)
        for s in range(0, m, QUERY_BLOCK):  # loop over blocks, not transitions
            qq = q[s:s + QUERY_BLOCK]
            best_i = np.full((len(qq), k), -1, np.int64)
            best_k = np.full((len(qq), k), np.inf)
            x = sp.vectors[qq].astype(np.float64)
            for a in range(0, n, DB_BLOCK):
                b = min(n, a + DB_BLOCK)
                ids = np.broadcast_to(np.arange(a, b, dtype=np.int64), (len(qq), b - a))
                if beyond:
                    key = self._rule_distance(sp, qq, ids)
                    key = np.where(self.rule.reached_from(key), np.inf, key)
                else:
                    diff = sp.vectors[a:b].astype(np.float64)[None, :, :] - x[:, None, :]
                    key = np.sqrt(np.einsum("mnd,mnd->mn", diff, diff))
                own = (ids >= lo[s:s + QUERY_BLOCK, None]) & (ids < hi[s:s + QUERY_BLOCK, None])
                key = np.where(own, np.inf, key)
                all_k = np.concatenate([best_k, key], axis=1)
                all_i = np.concatenate([best_i, ids], axis=1)
                order = np.argsort(all_k, axis=1, kind="stable")[:, :k]
                best_k = np.take_along_axis(all_k, order, axis=1)
                best_i = np.take_along_axis(all_i, order, axis=1)
            best_i = np.where(np.isfinite(best_k), best_i, -1)
            out[s:s + QUERY_BLOCK], outk[s:s + QUERY_BLOCK] = best_i, best_k
        return out, outk, np.isfinite(outk).sum(axis=1)

    # ---- recall ------------------------------------------------------------------------
    def _calibrate(self, sp: SplitSearch) -> None:
        """Measure (and for approximate indexes tune) the filtered recall@k of one split."""
        s, n, k = self.settings, len(sp), self.k
        extra = {"k": k, "target_recall": float(s.target_recall), "filtered": True}
        if sp.index.report.method == "exact":
            extra.update(recall=1.0, recall_lower=1.0, recall_queries=0, breadth=0)
            sp.report_extra = extra
            return
        q = sample_rows(n, s.recall_queries, s.seed, slot=3)
        own = sp.owner(q)
        lo, hi = sp.state_offsets[own], sp.state_offsets[own + 1]
        exact = build_index(sp.vectors, IndexSettings(method="exact", k=k, seed=s.seed, threads=s.threads))
        ref_ids, ref_key, ref_cnt = self._filtered(sp, exact, q, lo, hi, False)
        kth = np.where(ref_cnt > 0, ref_key[np.arange(len(q)), np.maximum(ref_cnt - 1, 0)], np.inf)

        def measure(b):
            sp.index.set_breadth(b)
            _, key, _ = self._filtered(sp, sp.index, q, lo, hi, False)
            hit = (key <= kth[:, None] * (1 + 1e-9) + 1e-12) & np.isfinite(key)
            per = hit.sum(axis=1) / np.maximum(ref_cnt, 1)
            return float(per.mean()), lower_bound(per, s.confidence_z)

        hi_b, r_hi = smallest_breadth(measure, sp.index.breadth, max(1, sp.index.max_breadth),
                                      float(s.target_recall))
        sp.index.set_breadth(hi_b)
        extra.update(recall=r_hi[0], recall_lower=r_hi[1], recall_queries=int(len(q)), breadth=int(hi_b))
        sp.report_extra = extra

    def describe(self) -> dict:
        """Per split: the index report and the filtered recall@k reached (JSON-able)."""
        out = {}
        for code, sp in sorted(self.splits.items()):
            out[SPLIT_NAMES[code]] = {"episodes": int(len(sp.episode_ids)), "states": len(sp),
                                      "index": sp.index.report.as_dict(), **sp.report_extra}
        return out


def build_goal_search(goal_table, episode_ids, lengths, splits, rule, *, k: int = 10, method: str = "auto",
                      target_recall: float = 0.95, seed: int = 0, file=None, key="relabel.weights.neighbour",
                      threads: int = 1) -> GoalSearch:
    """Index the goal vectors of each split's states and tune the filtered recall.

    Parameters
    ----------
    goal_table : ndarray (S, G)
        phi of every kept state in global state-row order (episode ``p`` has rows
        ``offsets[p] + p .. offsets[p + 1] + p``).
    episode_ids, lengths : array_like of int
        Kept episodes (ascending) and their transition counts.
    splits : array_like of int
        Split code of each kept episode.
    rule : RewardRule
        Sets the search space and, for near misses, the threshold.
    k, method, target_recall, seed
        The ``[relabel]`` keys ``neighbours``, ``index``, ``recall`` and the build's seed.
    file, key
        For the error raised when a split has fewer than two episodes.

    Returns
    -------
    GoalSearch

    Raises
    ------
    RecipeError
        When a split has a single episode (there are no other episodes to search).
    """
    ids = np.asarray(episode_ids, dtype=np.int64)
    lengths = np.asarray(lengths, dtype=np.int64)
    splits = np.asarray(splits, dtype=np.int64)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    settings = IndexSettings(method=method, k=int(k), target_recall=float(target_recall),
                             seed=int(seed), threads=int(threads))
    search = GoalSearch({}, rule, k, settings, dim=int(np.shape(goal_table)[1]))
    for code in np.unique(splits).tolist():
        pos = np.flatnonzero(splits == code)
        if len(pos) < 2:
            raise RecipeError(f"strategy '{key.rsplit('.', 1)[-1]}' needs at least 2 episodes in every split; "
                              f"the {SPLIT_NAMES[code]} split has {len(pos)}", file=file, key=key)
        starts = offsets[pos] + pos
        counts = lengths[pos] + 1
        rows = np.repeat(starts - np.concatenate([[0], np.cumsum(counts)[:-1]]), counts) + np.arange(counts.sum())
        values = np.asarray(goal_table[rows])
        vectors = search_space(rule, values)
        index = build_index(vectors, settings)
        sp = SplitSearch(code, ids[pos], lengths[pos], values, vectors, index)
        search._calibrate(sp)
        search.splits[int(code)] = sp
    return search
