"""The build summary: rows, rewarded fraction per strategy, goal-distance quantiles, warnings.

It also holds the composition the dataset card and ``goalkit info`` show (key ``composition``):
rows and reached rows per split and strategy, and exact histograms of the goal distance (in
multiples of the reach threshold, :data:`DISTANCE_RATIOS`) and of steps-to-goal (powers of two),
per split. Every count is exact and independent of chunking. Sets built before it was stored
have no ``composition`` key.
"""

from __future__ import annotations

import numpy as np

from goalkit import rng
from goalkit.pipeline.graphsummary import GraphSummary
from goalkit.pipeline.headsummary import HeadSummary
from goalkit.rows import SPLITS

#: About this many rows' distances are kept (a hash-chosen sample) for the quantiles.
SAMPLE_ROWS = 200_000
QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)
#: The summary warns when the threshold marks fewer / more rows than these as reached.
LOW_REACHED, HIGH_REACHED = 0.01, 0.90
#: Upper edges of the goal-distance bins, in multiples of the reach threshold (bin i counts
#: ``edges[i-1] < d <= edges[i]``, the first bin ``d <= edges[0]``; a last bin counts what lies
#: beyond, a separate count the NaN distances).
DISTANCE_RATIOS = (0.25, 0.5, 1.0, 2.0, 4.0, 8.0, 16.0)
#: Steps-to-goal bins: bin k counts ``2**k <= h < 2**(k+1)``; rows without a horizon (-1) apart.
HORIZON_BINS = 63


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
    rule : RewardRule, optional
        The reward rule; a region rule's bounds are stated in the summary (other rules add
        nothing, so summaries of sets without regions or masks are as before).
    """

    def __init__(self, strategy_names: dict, total_rows: int, seed: int, distance_unit: float = 1.0, rule=None):
        self.names = strategy_names
        self.rate = min(1.0, SAMPLE_ROWS / max(total_rows, 1))
        self.seed = seed
        size = max(strategy_names) + 1 if strategy_names else 1
        self.rows = {s: np.zeros(size, np.int64) for s in SPLITS}
        self.reached = {s: np.zeros(size, np.int64) for s in SPLITS}
        self.sample: list[np.ndarray] = []
        self.sample_keys: list[np.ndarray] = []
        self.unit = float(distance_unit) if distance_unit and distance_unit > 0 else 1.0
        self.edges = np.asarray(DISTANCE_RATIOS, dtype=np.float64) * self.unit
        self.distance = {s: np.zeros(len(DISTANCE_RATIOS) + 2, np.int64) for s in SPLITS}  # + beyond, NaN
        self.horizon = {s: np.zeros(HORIZON_BINS + 1, np.int64) for s in SPLITS}  # + no horizon
        self.rule = rule
        self.mask_dims: np.ndarray | None = None   # rows constraining each goal dimension
        self.mask_full = 0                          # rows constraining every dimension
        self.graph = GraphSummary(strategy_names)
        self.heads = HeadSummary()

    def add(self, split: str, cols: dict, keys: np.ndarray) -> None:
        """Count the rows of one chunk and split."""
        size = len(self.rows[split])
        self.rows[split] += np.bincount(cols["strategy"], minlength=size)[:size]
        self.reached[split] += np.bincount(cols["strategy"], weights=cols["reached"], minlength=size)[:size].astype(np.int64)
        u = rng.uniform(self.seed, cols["source_episode"], cols["source_step"], cols["slot"], stream="subsample")
        keep = u < self.rate
        d = np.asarray(cols["goal_distance"], dtype=np.float64)
        nan = np.isnan(d)
        bins = np.searchsorted(self.edges, d[~nan], side="left")
        self.distance[split][:-1] += np.bincount(bins, minlength=len(self.edges) + 1)
        self.distance[split][-1] += int(nan.sum())
        h = np.asarray(cols["steps_to_goal"], dtype=np.int64)
        has = h >= 1
        k = np.frexp(h[has].astype(np.float64))[1] - 1  # floor(log2(h)), exact below 2**53
        self.horizon[split][:-1] += np.bincount(np.minimum(k, HORIZON_BINS - 1), minlength=HORIZON_BINS)
        self.horizon[split][-1] += int((~has).sum())
        self.sample.append(np.asarray(cols["goal_distance"], dtype=np.float64)[keep])
        self.sample_keys.append(keys[keep])
        if "goal_mask" in cols:
            m = np.asarray(cols["goal_mask"]) != 0
            dims = m.sum(axis=0, dtype=np.int64)
            self.mask_dims = dims if self.mask_dims is None else self.mask_dims + dims
            self.mask_full += int(m.all(axis=1).sum())
        self.graph.add(split, cols)
        self.heads.add(cols)

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
        out["composition"] = self.composition()
        if self.mask_dims is not None:
            out["goal_masks"] = {"rows_per_dimension": self.mask_dims.tolist(), "full_mask_rows": self.mask_full}
        if self.rule is not None and self.rule.distance_name == "region":
            out["region"] = {"lower": list(self.rule.lower), "upper": list(self.rule.upper),
                             "margin": float(self.rule.threshold)}
        out.update(self.graph.result())
        out.update(self.heads.result())
        return out

    def composition(self) -> dict:
        """Rows and reached rows per split and strategy; distance and horizon histograms per split."""
        by_split = {}
        for s in SPLITS:
            by_split[s] = {name: {"rows": int(self.rows[s][code]), "reached": int(self.reached[s][code])}
                           for code, name in sorted(self.names.items())
                           if code < len(self.rows[s]) and self.rows[s][code]}
        top = max([int(np.flatnonzero(self.horizon[s][:-1]).max()) + 1
                   for s in SPLITS if self.horizon[s][:-1].any()] or [0])
        return {
            "by_split": by_split,
            "goal_distance_histogram": {
                "unit": self.unit, "ratios": list(DISTANCE_RATIOS),
                "counts": {s: self.distance[s][:-1].tolist() for s in SPLITS},
                "nan": {s: int(self.distance[s][-1]) for s in SPLITS}},
            "horizon_histogram": {
                "low": [1 << k for k in range(top)],
                "counts": {s: self.horizon[s][:top].tolist() for s in SPLITS},
                "none": {s: int(self.horizon[s][-1]) for s in SPLITS}},
        }
