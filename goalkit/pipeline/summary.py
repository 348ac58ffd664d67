"""The build summary: rows, rewarded fraction per strategy, goal-distance quantiles, warnings."""

from __future__ import annotations

import numpy as np

from goalkit import rng
from goalkit.pipeline.graphsummary import GraphSummary
from goalkit.rows import SPLITS

#: About this many rows' distances are kept (a hash-chosen sample) for the quantiles.
SAMPLE_ROWS = 200_000
QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)
#: The summary warns when the threshold marks fewer / more rows than these as reached.
LOW_REACHED, HIGH_REACHED = 0.01, 0.90


class SummaryBuilder:
    """Accumulate the summary chunk by chunk; the result does not depend on chunking.

    Parameters
    ----------
    strategy_names : dict of int to str
        Strategy code -> name.
    total_rows : int
        Expected number of rows, to set the sampling rate of the distance quantiles.
    seed : int
        The build's seed (the distance sample is a pure function of it and each row's address).
    """

    def __init__(self, strategy_names: dict, total_rows: int, seed: int):
        self.names = strategy_names
        self.rate = min(1.0, SAMPLE_ROWS / max(total_rows, 1))
        self.seed = seed
        size = max(strategy_names) + 1 if strategy_names else 1
        self.rows = {s: np.zeros(size, np.int64) for s in SPLITS}
        self.reached = {s: np.zeros(size, np.int64) for s in SPLITS}
        self.sample: list[np.ndarray] = []
        self.sample_keys: list[np.ndarray] = []
        self.graph = GraphSummary(strategy_names)

    def add(self, split: str, cols: dict, keys: np.ndarray) -> None:
        """Count the rows of one chunk and split."""
        size = len(self.rows[split])
        self.rows[split] += np.bincount(cols["strategy"], minlength=size)[:size]
        self.reached[split] += np.bincount(cols["strategy"], weights=cols["reached"], minlength=size)[:size].astype(np.int64)
        u = rng.uniform(self.seed, cols["source_episode"], cols["source_step"], cols["slot"], stream="subsample")
        keep = u < self.rate
        self.sample.append(np.asarray(cols["goal_distance"], dtype=np.float64)[keep])
        self.sample_keys.append(keys[keep])
        self.graph.add(split, cols)

    def result(self) -> dict:
        """Return the summary as a JSON-able dict."""
        out: dict = {"rows": {s: int(r.sum()) for s, r in self.rows.items()}, "strategies": {}, "warnings": []}
        all_rows = self.rows["train"] + self.rows["validation"]
        all_reached = self.reached["train"] + self.reached["validation"]
        for code, name in sorted(self.names.items()):
            if code < len(all_rows) and all_rows[code]:
                out["strategies"][name] = {"rows": int(all_rows[code]),
                                           "reached_fraction": float(all_reached[code] / all_rows[code])}
        total = int(all_rows.sum())
        frac = float(all_reached.sum() / total) if total else 0.0
        out["reached_fraction"] = frac
        if total and frac < LOW_REACHED:
            out["warnings"].append(f"the threshold marks only {frac:.2%} of rows as reached (below "
                                   f"{LOW_REACHED:.0%}): it may be too tight; see `goalkit tune`")
        if total and frac > HIGH_REACHED:
            out["warnings"].append(f"the threshold marks {frac:.2%} of rows as reached (above "
                                   f"{HIGH_REACHED:.0%}): it may be too loose; see `goalkit tune`")
        d = np.concatenate(self.sample) if self.sample else np.zeros(0)
        if len(d):
            qs = np.quantile(d, QUANTILES)
            out["goal_distance_quantiles"] = {f"q{int(q * 100):02d}": float(v) for q, v in zip(QUANTILES, qs)}
        out["goal_distance_sample_rows"] = int(len(d))
        out.update(self.graph.result())
        return out
