"""Threshold sweep over labelled distances: confusion counts, ROC / PR summaries, choosers.

A labelled pair has a distance ``d`` (the reward rule's distance between the reached goal
``phi(s_{t+1})`` and a goal) and a label ``y`` (1 = the goal counts as reached). The rule
under study calls a pair reached iff ``d <= thr`` (inclusive). Every distinct distance is a
candidate threshold; counts at all of them come from one sort and two cumulative sums.

Conventions
-----------
* ``thresholds`` ascend; at ``thresholds[k]`` a pair is *predicted reached* iff
  ``d <= thresholds[k]``; any threshold in ``[thresholds[k], thresholds[k + 1])`` gives the
  same counts on these pairs.
* TPR = recall = TP / P, FPR = FP / N, precision = TP / (TP + FP) (never 0/0: every candidate
  threshold admits at least one pair), F1 = 2 TP / (2 TP + FP + FN).
* ROC AUC is the trapezoid area under (FPR, TPR) from (0, 0); tied distances form one
  step, i.e. count one half, as in scikit-learn's ``roc_auc_score`` with score ``-d``.
* PR AUC is average precision as scikit-learn defines it:
  ``AP = sum_k (R_k - R_{k-1}) P_k`` over ascending thresholds, ``R_{-1} = 0`` (no
  interpolation).

Choosers (ties go to the smallest threshold, i.e. the stricter rule)
--------------------------------------------------------------------
``max-f1``            the threshold of largest F1.
``target-precision``  the *largest* threshold whose precision is at least ``target``:
                      recall grows with the threshold, so this is the most permissive rule
                      that keeps the precision target (precision is not monotone, so the
                      set of qualifying thresholds need not be an interval).
``youden``            the threshold of largest Youden's J = TPR - FPR (Youden, 1950).

A chosen candidate ``d_k`` becomes a threshold value by its *placement*: ``"lower"`` is
``d_k`` itself, ``"midpoint"`` (the default) is halfway to the next candidate ``d_{k+1}``,
which leaves a margin on both sides and gives the same counts whether the rule is inclusive
(``<=``) or not (``<``). For the largest candidate there is no next one: the value is
``d_k`` for an inclusive rule and the next float above it for an exclusive one.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from goalkit.errors import TuningError

#: Chooser names.
CHOOSERS = ("max-f1", "target-precision", "youden")
#: Placement names.
PLACEMENTS = ("midpoint", "lower")


# ---- input checks ------------------------------------------------------------------------
def check_labelled(distances, labels, groups=None, *, source=None):
    """Check and convert labelled distances; return ``(d float64, y int64, groups int64 or None)``.

    Raises
    ------
    TuningError
        On shape mismatch, non-finite or negative distances, labels other than 0/1, or no pairs.
    """
    d = np.asarray(distances, dtype=np.float64)
    y_raw = np.asarray(labels)
    if d.ndim != 1:
        raise TuningError(f"expected distances of shape (M,), got {d.shape}", file=source, key="distances")
    if y_raw.shape != d.shape:
        raise TuningError(f"expected labels of shape {d.shape} (one per distance), got {y_raw.shape}",
                          file=source, key="labels")
    if d.size == 0:
        raise TuningError("expected at least one labelled pair, got none", file=source)
    bad = np.flatnonzero(~np.isfinite(d) | (d < 0))
    if bad.size:
        raise TuningError(f"row {bad[0]}: expected finite distances >= 0, got {d[bad[0]].item()!r}",
                          file=source, key="distances")
    y = y_raw.astype(np.int64)
    bad = np.flatnonzero((y != y_raw) | ((y != 0) & (y != 1)))
    if bad.size:
        raise TuningError(f"row {bad[0]}: expected label 0 or 1, got {y_raw[bad[0]].item()!r}",
                          file=source, key="labels")
    g = None
    if groups is not None:
        g = np.asarray(groups)
        if g.shape != d.shape:
            raise TuningError(f"expected groups of shape {d.shape}, got {g.shape}", file=source,
                              key="groups")
        g = g.astype(np.int64)
    return d, y, g


# ---- the sweep ---------------------------------------------------------------------------
@dataclass(frozen=True)
class ThresholdSweep:
    """Confusion counts at every candidate threshold (see the module docstring).

    Attributes
    ----------
    thresholds : ndarray of float64, shape (K,)
        Distinct distances, ascending.
    tp, fp : ndarray of int64, shape (K,)
        Reached pairs / not-reached pairs with ``d <= thresholds[k]``.
    n_pos, n_neg : int
        Number of pairs labelled 1 and 0.
    """

    thresholds: np.ndarray
    tp: np.ndarray
    fp: np.ndarray
    n_pos: int
    n_neg: int

    @property
    def fn(self) -> np.ndarray:
        """False negatives (reached pairs with ``d > thr``)."""
        return self.n_pos - self.tp

    @property
    def tn(self) -> np.ndarray:
        """True negatives (not-reached pairs with ``d > thr``)."""
        return self.n_neg - self.fp

    @property
    def tpr(self) -> np.ndarray:
        """True positive rate TP / P (NaN when there are no reached pairs)."""
        return _ratio(self.tp, self.n_pos)

    recall = tpr

    @property
    def fpr(self) -> np.ndarray:
        """False positive rate FP / N (NaN when there are no not-reached pairs)."""
        return _ratio(self.fp, self.n_neg)

    @property
    def precision(self) -> np.ndarray:
        """TP / (TP + FP)."""
        return self.tp / (self.tp + self.fp)

    @property
    def f1(self) -> np.ndarray:
        """2 TP / (2 TP + FP + FN)."""
        return _f1(self.tp, self.fp, self.n_pos)

    def confusion(self, k: int) -> np.ndarray:
        """Confusion matrix at candidate ``k``: ``[[TN, FP], [FN, TP]]`` (scikit-learn's layout)."""
        return np.array([[self.tn[k], self.fp[k]], [self.fn[k], self.tp[k]]], dtype=np.int64)

    def roc_curve(self) -> tuple[np.ndarray, np.ndarray]:
        """Return ``(fpr, tpr)`` with the point (0, 0) (threshold below every distance) first."""
        return np.r_[0.0, self.fpr], np.r_[0.0, self.tpr]

    def roc_auc(self) -> float:
        """Area under the ROC curve (trapezoid rule; needs both labels)."""
        self._need_both("ROC AUC")
        x, y = self.roc_curve()
        return float(np.sum(np.diff(x) * (y[1:] + y[:-1]) / 2.0))

    def average_precision(self) -> float:
        """PR AUC as average precision, ``sum_k (R_k - R_{k-1}) P_k`` (needs reached pairs)."""
        if self.n_pos == 0:
            raise TuningError("average precision needs at least one pair labelled reached (1)")
        r = self.recall
        return float(np.sum(np.diff(np.r_[0.0, r]) * self.precision))

    def at(self, threshold: float, inclusive: bool = True) -> dict:
        """Counts and rates of the rule ``d <= threshold`` (or ``d < threshold``) on these pairs."""
        side = "right" if inclusive else "left"
        k = int(np.searchsorted(self.thresholds, threshold, side=side)) - 1
        tp = int(self.tp[k]) if k >= 0 else 0
        fp = int(self.fp[k]) if k >= 0 else 0
        return _rates(float(threshold), tp, fp, self.n_pos, self.n_neg)

    def _need_both(self, what: str) -> None:
        if self.n_pos == 0 or self.n_neg == 0:
            raise TuningError(f"{what} needs pairs of both labels; got {self.n_pos} labelled 1 "
                              f"and {self.n_neg} labelled 0")


def _ratio(a, b):
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(b > 0, a / np.where(b > 0, b, 1.0), np.nan)


def _f1(tp, fp, n_pos):
    tp = np.asarray(tp, dtype=np.int64)
    den = tp + np.asarray(fp, dtype=np.int64) + np.asarray(n_pos, dtype=np.int64)  # 2TP+FP+FN
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, (2 * tp) / np.where(den > 0, den, 1), 0.0)


def _rates(threshold, tp, fp, n_pos, n_neg) -> dict:
    pred = tp + fp
    return {
        "threshold": threshold,
        "tp": tp, "fp": fp, "fn": n_pos - tp, "tn": n_neg - fp,
        "precision": tp / pred if pred else float("nan"),
        "recall": tp / n_pos if n_pos else float("nan"),
        "fpr": fp / n_neg if n_neg else float("nan"),
        "f1": 2 * tp / (tp + fp + n_pos) if (tp + fp + n_pos) else 0.0,
    }


def sweep_thresholds(distances, labels, *, source=None) -> ThresholdSweep:
    """Sweep every distinct distance as a threshold of the inclusive rule ``d <= thr``.

    Parameters
    ----------
    distances : array_like of float, shape (M,)
        Distance of each labelled pair (finite, >= 0).
    labels : array_like of {0, 1}, shape (M,)
        1 where the pair counts as reached.
    source : str, optional
        Where the pairs came from, for messages.

    Returns
    -------
    ThresholdSweep

    Examples
    --------
    >>> s = sweep_thresholds([0.1, 0.4, 0.2, 0.4], [1, 0, 1, 1])
    >>> s.thresholds.tolist(), s.tp.tolist(), s.fp.tolist()
    ([0.1, 0.2, 0.4], [1, 2, 3], [0, 0, 1])
    """
    d, y, _ = check_labelled(distances, labels, source=source)
    order = np.argsort(d, kind="stable")
    ds, ys = d[order], y[order]
    ends = _run_ends(ds)
    tp = np.cumsum(ys)[ends]
    fp = (ends + 1) - tp
    n_pos = int(ys.sum())
    return ThresholdSweep(ds[ends], tp.astype(np.int64), fp.astype(np.int64), n_pos, int(d.size - n_pos))


def _run_ends(sorted_values: np.ndarray) -> np.ndarray:
    """Index of the last element of each run of equal values in a sorted array."""
    return np.flatnonzero(np.r_[sorted_values[1:] != sorted_values[:-1], True])


# ---- choosing ----------------------------------------------------------------------------
@dataclass(frozen=True)
class ThresholdChoice:
    """A chosen threshold and how the rule does with it on the labelled pairs.

    Attributes
    ----------
    chooser : str
        One of :data:`CHOOSERS`.
    threshold : float
        The value to put in a recipe (after placement).
    candidate : float
        The distance ``d_k`` the choice was made at.
    index : int
        ``k``, the candidate's position in the sweep.
    target : float or None
        The precision target of ``target-precision``.
    placement : str
        One of :data:`PLACEMENTS`.
    tp, fp, fn, tn : int
        Confusion counts at the choice.
    precision, recall, fpr, f1, youden : float
        Rates at the choice.
    """

    chooser: str
    threshold: float
    candidate: float
    index: int
    target: float | None
    placement: str
    tp: int
    fp: int
    fn: int
    tn: int
    precision: float
    recall: float
    fpr: float
    f1: float
    youden: float

    def as_dict(self) -> dict:
        """JSON-able form."""
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


def check_chooser(chooser: str, target, placement: str) -> None:
    """Refuse an unknown chooser or placement, or a missing / impossible precision target."""
    if chooser not in CHOOSERS:
        raise TuningError(f"unknown chooser {chooser!r}; valid: {', '.join(CHOOSERS)}", key="choose")
    if placement not in PLACEMENTS:
        raise TuningError(f"unknown placement {placement!r}; valid: {', '.join(PLACEMENTS)}",
                          key="placement")
    if chooser == "target-precision":
        if target is None or not (0.0 < float(target) <= 1.0):
            raise TuningError(f"chooser 'target-precision' needs a target in (0, 1], got {target!r}",
                              key="target")


def choose_index(thresholds, tp, fp, n_pos, n_neg, valid, chooser: str, target=None) -> np.ndarray:
    """Vectorised choosers over rows of weighted sweeps (the bootstrap's core).

    Parameters
    ----------
    thresholds : ndarray (K,)
        Candidate distances, ascending.
    tp, fp : ndarray of int64 (B, K)
        Cumulative counts per row (a row is one sweep, e.g. one bootstrap resample).
    n_pos, n_neg : ndarray of int64 (B,)
        Totals per row.
    valid : ndarray of bool (B, K)
        Candidates present in the row (a candidate with no pair in a resample is skipped).
    chooser, target
        See the module docstring.

    Returns
    -------
    ndarray of int64 (B,)
        Chosen candidate per row, -1 where the choice is undefined (no reached pairs; for
        Youden no pairs of one label; for a precision target, no candidate meeting it).
    """
    tp = np.asarray(tp, dtype=np.int64)
    fp = np.asarray(fp, dtype=np.int64)
    n_pos = np.asarray(n_pos, dtype=np.int64)[:, None]
    n_neg = np.asarray(n_neg, dtype=np.int64)[:, None]
    if chooser == "max-f1":
        score = np.where(valid, _f1(tp, fp, n_pos), -np.inf)
        ok = n_pos[:, 0] > 0
    elif chooser == "youden":
        # J = TP/P - FP/N = (TP N - FP P) / (P N): one correctly rounded division of exact
        # integers, so equal J values compare equal and ties go to the smallest threshold.
        with np.errstate(invalid="ignore", divide="ignore"):
            j = (tp * n_neg - fp * n_pos) / (n_pos * n_neg)
        score = np.where(valid, j, -np.inf)
        ok = (n_pos[:, 0] > 0) & (n_neg[:, 0] > 0)
    elif chooser == "target-precision":
        with np.errstate(invalid="ignore", divide="ignore"):
            prec = tp / np.where(tp + fp > 0, tp + fp, 1)
        meets = valid & (prec >= float(target))
        k = tp.shape[1]
        last = k - 1 - np.argmax(meets[:, ::-1], axis=1)
        return np.where(meets.any(axis=1) & (n_pos[:, 0] > 0), last, -1).astype(np.int64)
    else:  # pragma: no cover - callers check
        raise TuningError(f"unknown chooser {chooser!r}")
    idx = np.argmax(score, axis=1)
    return np.where(ok & valid.any(axis=1), idx, -1).astype(np.int64)


def place(thresholds, valid, idx, placement: str, inclusive: bool) -> np.ndarray:
    """Turn chosen candidates into threshold values (vectorised over rows; NaN where idx < 0)."""
    thresholds = np.asarray(thresholds, dtype=np.float64)
    b, k = valid.shape
    rows = np.arange(b)
    safe = np.maximum(idx, 0)
    # next valid candidate after idx: reverse running minimum of valid positions
    pos = np.where(valid, np.arange(k)[None, :], k)
    nxt_from = np.minimum.accumulate(pos[:, ::-1], axis=1)[:, ::-1]  # first valid at >= j
    nxt = np.where(safe + 1 < k, nxt_from[rows, np.minimum(safe + 1, k - 1)], k)
    upper = thresholds[np.minimum(nxt, k - 1)]
    return place_values(thresholds[safe], upper, nxt < k, idx, placement, inclusive)


def place_values(lower, upper, has_next, idx, placement: str, inclusive: bool) -> np.ndarray:
    """Threshold values from chosen candidates ``lower`` and the next candidates ``upper``.

    ``has_next``: whether a next candidate exists (else ``upper`` is ignored); NaN where
    ``idx < 0``. See the module docstring for the placements.
    """
    lower = np.asarray(lower, dtype=np.float64)
    upper = np.asarray(upper, dtype=np.float64)
    if placement == "midpoint":
        mid = lower + (upper - lower) / 2.0
        if inclusive:  # need lower <= thr < upper (adjacent floats can round the midpoint up)
            mid = np.where(mid < upper, mid, lower)
        else:          # need lower < thr <= upper
            mid = np.where(mid > lower, mid, upper)
        out = np.where(has_next, mid, lower if inclusive else np.nextafter(lower, np.inf))
    else:
        out = lower if inclusive else np.nextafter(lower, np.inf)
    return np.where(np.asarray(idx) >= 0, out, np.nan)


def choose_threshold(sweep: ThresholdSweep, chooser: str = "max-f1", *, target=None,
                     placement: str = "midpoint", inclusive: bool = True) -> ThresholdChoice:
    """Choose a threshold from a sweep.

    Parameters
    ----------
    sweep : ThresholdSweep
    chooser : {"max-f1", "target-precision", "youden"}
        See the module docstring.
    target : float, optional
        Precision target in (0, 1] for ``target-precision``.
    placement : {"midpoint", "lower"}
        Where between the chosen candidate and the next the threshold goes.
    inclusive : bool
        Whether the rule that will use the threshold is ``d <= thr`` (True) or ``d < thr``.

    Returns
    -------
    ThresholdChoice

    Raises
    ------
    TuningError
        If the choice is undefined on these pairs (no reached pairs; Youden without both
        labels; no threshold reaching the precision target).

    Examples
    --------
    >>> s = sweep_thresholds([0.1, 0.2, 0.5, 0.7], [1, 1, 0, 0])
    >>> c = choose_threshold(s, "max-f1")
    >>> c.candidate, c.threshold, c.f1
    (0.2, 0.35, 1.0)
    """
    check_chooser(chooser, target, placement)
    valid = np.ones((1, sweep.thresholds.size), dtype=bool)
    idx = choose_index(sweep.thresholds, sweep.tp[None], sweep.fp[None], [sweep.n_pos],
                       [sweep.n_neg], valid, chooser, target)
    k = int(idx[0])
    if k < 0:
        if chooser == "target-precision" and sweep.n_pos > 0:
            best = float(np.max(sweep.precision))
            raise TuningError(f"no threshold reaches precision {target}; the best on these pairs "
                              f"is {best:.4g}", key="target")
        raise TuningError(f"chooser {chooser!r} needs pairs of both labels; got {sweep.n_pos} "
                          f"labelled 1 and {sweep.n_neg} labelled 0")
    thr = float(place(sweep.thresholds, valid, idx, placement, inclusive)[0])
    r = _rates(thr, int(sweep.tp[k]), int(sweep.fp[k]), sweep.n_pos, sweep.n_neg)
    return ThresholdChoice(
        chooser=chooser, threshold=thr, candidate=float(sweep.thresholds[k]), index=k,
        target=None if target is None else float(target), placement=placement,
        tp=r["tp"], fp=r["fp"], fn=r["fn"], tn=r["tn"], precision=r["precision"],
        recall=r["recall"], fpr=r["fpr"], f1=r["f1"], youden=r["recall"] - r["fpr"])
