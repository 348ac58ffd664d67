"""Everything for labelled tuning in one estimator, so the ``tune`` command stays thin.

>>> import numpy as np
>>> from goalkit.reward import RewardRule
>>> from goalkit.thresholds.labels import LabelledPairs
>>> a = np.array([[0.01], [0.02], [0.03], [0.30], [0.40], [0.50]])
>>> pairs = LabelledPairs(a, np.zeros_like(a), np.array([1, 1, 1, 0, 0, 0], bool),
...                       np.array([0, 0, 1, 1, 2, 2]), True, "example")
>>> t = ThresholdTuner(RewardRule("euclidean", 0.05), n_resamples=20).fit(pairs)
>>> t.choice_.threshold, t.suggested_rule_.threshold, t.roc_auc_
(0.165, 0.165, 1.0)
"""

from __future__ import annotations

import numpy as np

from goalkit.errors import TuningError
from goalkit.thresholds.bootstrap import bootstrap_threshold
from goalkit.thresholds.box import suggest_box
from goalkit.thresholds.labels import LabelledPairs
from goalkit.thresholds.metrics import check_chooser, choose_threshold, sweep_thresholds
from goalkit.thresholds.region import describe_bounds, is_region, moved_bounds, shift_of, shifted_back, sweep_distances


class ThresholdTuner:
    """Choose a reward rule's threshold from labelled pairs.

    Parameters
    ----------
    rule : RewardRule
        The rule being tuned: its distance, weights and inclusiveness are kept, only the
        threshold changes. For ``box`` the distance is normalised by the rule's current
        tolerances, the chosen value is a scale ``s``, and the suggested tolerances are
        ``s * tolerances``; independent per-dimension suggestions are in ``box_``. For
        ``region`` the chosen value is the margin by which every finite bound moves outwards
        (:mod:`goalkit.thresholds.region`): the suggested rule keeps the bounds with that margin as
        its threshold, and ``summary()["region"]`` states the bounds it amounts to.
    chooser : {"max-f1", "target-precision", "youden"}
    target : float, optional
        Precision target of ``target-precision``.
    placement : {"midpoint", "lower"}
    n_resamples : int
        Bootstrap resamples (over episodes); 0 skips the interval.
    confidence : float
        Coverage of the bootstrap percentile interval.
    seed : int
        Seed of the bootstrap draws.
    box_method : {"recall", "quantile"}
        Method of the per-dimension box suggestion (box rules only).
    box_recall : float
        Recall target of the box suggestion.

    Attributes
    ----------
    distances_ : ndarray (M,)
    sweep_ : ThresholdSweep
    choice_ : ThresholdChoice
    interval_ : ThresholdInterval or None
    roc_auc_, average_precision_ : float
    current_ : dict
        The rule's current threshold evaluated on the pairs.
    suggested_rule_ : RewardRule
        ``rule`` with the chosen threshold.
    box_ : BoxSuggestion or None
    pairs_ : dict
        Summary of the labelled pairs.
    """

    def __init__(self, rule, chooser: str = "max-f1", target=None, placement: str = "midpoint",
                 n_resamples: int = 1000, confidence: float = 0.95, seed: int = 0,
                 box_method: str = "recall", box_recall: float = 0.95):
        self.rule = rule
        self.chooser = chooser
        self.target = target
        self.placement = placement
        self.n_resamples = n_resamples
        self.confidence = confidence
        self.seed = seed
        self.box_method = box_method
        self.box_recall = box_recall

    def fit(self, pairs: LabelledPairs, executor=None) -> "ThresholdTuner":
        """Sweep, choose, bootstrap and (for box) suggest tolerances; return ``self``.

        ``executor`` (a :class:`concurrent.futures.Executor`, optional) runs the bootstrap
        while the caller goes on; ``interval_`` then waits for it when first read (and raises
        what the bootstrap raised). The result is the same either way.

        Raises
        ------
        TuningError
            If the pairs do not have both labels, or the choice is undefined.
        ParameterError
            If the rule does not fit the pairs' goal dimension.
        """
        check_chooser(self.chooser, self.target, self.placement)
        rule = self.rule
        rule.check_dim(pairs.dim)
        d = rule.distance(pairs.achieved, pairs.goal, pairs.mask)  # masked pairs: kept dimensions only
        shift = shift_of(d) if is_region(rule) else 0.0
        if is_region(rule):  # signed distances: the sweep sees them shifted to >= 0
            d = sweep_distances(d, shift)
        y = pairs.reached.astype(np.int64)
        sweep = sweep_thresholds(d, y, source=pairs.source or None)
        if sweep.n_pos == 0 or sweep.n_neg == 0:
            raise TuningError(f"tuning needs pairs labelled both reached and not reached; got "
                              f"{sweep.n_pos} reached and {sweep.n_neg} not reached",
                              file=pairs.source or None, key="reached")
        self.distances_ = d
        self.sweep_ = sweep
        self.choice_ = choose_threshold(sweep, self.chooser, target=self.target,
                                        placement=self.placement, inclusive=rule.inclusive)
        self.roc_auc_ = sweep.roc_auc()
        self.average_precision_ = sweep.average_precision()
        is_box = rule.distance_name == "box"
        current = 1.0 if is_box else float(rule.threshold)
        self.current_ = sweep.at(current - shift, rule.inclusive)
        self._interval, self._pending = None, None
        if self.n_resamples:
            groups = pairs.groups if pairs.grouped else None

            def interval():
                iv = bootstrap_threshold(d, y, groups, chooser=self.chooser, target=self.target,
                                         placement=self.placement, inclusive=rule.inclusive,
                                         n_resamples=self.n_resamples, confidence=self.confidence,
                                         seed=self.seed)
                return shifted_back(self.choice_, iv, shift)[1] if is_region(rule) else iv

            if executor is None:
                self._interval = interval()
            else:
                self._pending = executor.submit(interval)
        if is_region(rule):
            self.choice_, _ = shifted_back(self.choice_, None, shift)
            self.current_ = {**self.current_, "threshold": current}
            self.suggested_rule_ = rule.replace(threshold=self.choice_.threshold)
            self.box_ = None
        elif is_box:
            tol = np.asarray(rule.threshold, dtype=np.float64)
            self.suggested_rule_ = rule.replace(threshold=tuple((tol * self.choice_.threshold).tolist()))
            # a dimension a pair's mask leaves out never constrains it: its difference counts as 0
            achieved = (pairs.achieved if pairs.mask is None
                        else np.where(pairs.mask.astype(bool), pairs.achieved, pairs.goal))
            self.box_ = suggest_box(achieved, pairs.goal, y, method=self.box_method,
                                    recall=self.box_recall)
        else:
            self.suggested_rule_ = rule.replace(threshold=self.choice_.threshold)
            self.box_ = None
        self.pairs_ = pairs.describe()
        return self

    @property
    def interval_(self):
        """The bootstrap interval (:class:`ThresholdInterval`), None without resamples."""
        if self._pending is not None:
            pending, self._pending = self._pending, None
            self._interval = pending.result()
        return self._interval

    def recipe_threshold(self):
        """The value for the recipe's ``[reward] threshold`` (a number, or a list for box)."""
        return self.suggested_rule_.describe()["threshold"]

    def summary(self) -> dict:
        """JSON-able summary of the fit (what ``goalkit tune --json`` prints)."""
        out = {
            "pairs": self.pairs_,
            "rule": self.rule.describe(),
            "chooser": self.chooser,
            "choice": self.choice_.as_dict(),
            "suggested_threshold": self.recipe_threshold(),
            "current": self.current_,
            "roc_auc": self.roc_auc_,
            "average_precision": self.average_precision_,
            "candidates": int(self.sweep_.thresholds.size),
            "interval": None if self.interval_ is None else self.interval_.as_dict(),
            "box": None if self.box_ is None else self.box_.as_dict(),
        }
        if is_region(self.rule):
            moved = moved_bounds(self.rule, self.choice_.threshold)
            out["region"] = {"margin": self.choice_.threshold, "lower": list(moved.lower),
                             "upper": list(moved.upper), "bounds": describe_bounds(moved)}
        if self.interval_ is not None and self.rule.distance_name == "box":
            tol = np.asarray(self.rule.threshold, dtype=np.float64)
            out["interval"]["tolerances_low"] = (tol * self.interval_.low).tolist()
            out["interval"]["tolerances_high"] = (tol * self.interval_.high).tolist()
        return out
