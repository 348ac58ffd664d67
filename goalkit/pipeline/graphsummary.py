"""The build summary's ``graph`` entry: graph distances per strategy and the neighbour guard's counts.

Filled chunk by chunk from the rows' ``graph_steps`` column (:mod:`goalkit.goals.stategraph`);
counts and histograms only, so the result does not depend on chunking.
"""

from __future__ import annotations

import numpy as np

from goalkit.rows import SPLITS

QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)
NEIGHBOUR = 6


class GraphSummary:
    """Accumulate per strategy: histogram of finite graph distances, unreachable and not-computed
    counts, and agreement with ``steps_to_goal`` (``graph_steps == steps_to_goal - 1``: the logs
    show no shorter way than the episode's own); per split the neighbour goals kept and dropped."""

    def __init__(self, strategy_names: dict):
        self.names = strategy_names
        self.hist: dict[int, np.ndarray] = {}
        self.counts: dict[int, np.ndarray] = {}  # unreachable, not computed, same-episode, agree, reached-same, reached-agree
        self.kept = {s: 0 for s in SPLITS}
        self.dropped = {s: 0 for s in SPLITS}
        self.seen = False

    def add(self, split: str, cols: dict) -> None:
        """Count one chunk's rows of one split (no-op without a ``graph_steps`` column)."""
        if "graph_steps" not in cols:
            return
        self.seen = True
        g = np.asarray(cols["graph_steps"])
        s = np.asarray(cols["strategy"])
        steps = np.asarray(cols["steps_to_goal"])
        reached = np.asarray(cols["reached"]).astype(bool)
        nb = s == NEIGHBOUR
        self.kept[split] += int((nb & (np.asarray(cols["hop_episode"]) >= 0)).sum())
        self.dropped[split] += int((nb & (np.asarray(cols["hop_episode"]) < 0)).sum())
        for code in np.unique(s).tolist():
            m = s == code
            gm, sm, rm = g[m], steps[m], reached[m]
            fin = gm >= 0
            h = np.bincount(gm[fin])
            old = self.hist.get(code, np.zeros(0, np.int64))
            size = max(len(old), len(h))
            self.hist[code] = np.pad(old, (0, size - len(old))) + np.pad(h, (0, size - len(h)))
            # graph_steps counts from s_t+1, steps_to_goal from s_t: they agree when g = steps - 1
            both = fin & (sm >= 0)
            agree = both & (gm == sm - 1)
            c = np.array([(gm == -2).sum(), (gm == -1).sum(), both.sum(), agree.sum(), (both & rm).sum(),
                          (agree & rm).sum()], np.int64)
            self.counts[code] = self.counts.get(code, np.zeros(6, np.int64)) + c

    def result(self) -> dict:
        """The ``graph`` entry (empty dict when no row had a graph distance column)."""
        if not self.seen:
            return {}
        per = {}
        for code in sorted(self.counts):
            h = self.hist.get(code, np.zeros(0, np.int64))
            unreach, not_comp, same, agree, r_same, r_agree = (int(v) for v in self.counts[code])
            entry = {"finite": int(h.sum()), "unreachable": unreach, "not_computed": not_comp}
            if h.sum():
                cdf = np.cumsum(h) / h.sum()
                entry["quantiles"] = {f"q{int(q * 100):02d}": int(np.searchsorted(cdf, q)) for q in QUANTILES}
                entry["mean"] = float((np.arange(len(h)) * h).sum() / h.sum())
            entry["agree_with_steps_to_goal"] = agree / same if same else None
            entry["reached_agree_with_steps_to_goal"] = r_agree / r_same if r_same else None
            per[self.names.get(code, str(code))] = entry
        return {"graph": {"strategies": per, "neighbour_kept": dict(self.kept),
                          "neighbour_dropped": dict(self.dropped)}}


def summary_lines(summary: dict) -> list:
    """Text lines of the build summary for the graph entry (may be empty)."""
    g = summary.get("graph")
    if not g:
        return []
    lines = []
    for name, e in g["strategies"].items():
        q = e.get("quantiles") or {}
        agree = e.get("agree_with_steps_to_goal")
        lines.append(f"  graph steps ({name}): {e['finite']:,} finite, median {q.get('q50', '-')}, "
                     f"{e['unreachable']:,} beyond the horizon, {e['not_computed']:,} not computed"
                     + (f"; {agree:.1%} agree with steps_to_goal" if agree is not None else ""))
    dropped = sum(g["neighbour_dropped"].values())
    if dropped or sum(g["neighbour_kept"].values()):
        lines.append(f"  neighbour guard: {sum(g['neighbour_kept'].values()):,} kept, {dropped:,} dropped "
                     f"(not connected within the horizon)")
    return lines
