"""The segment evaluation of bootstrap resamples (max-f1, youden) against independent references.

A resample that draws episode ``g`` ``c_g`` times is the same data as the pairs of each episode
repeated ``c_g`` times, so every check below computes each resample's choice a second way:

* the per-resample computation: the pairs repeated by their weights, one plain sweep and one
  chooser (``sweep_thresholds`` + ``choose_threshold``, which never see weights or segments);
* scikit-learn 1.x (Pedregosa et al., 2011): ``precision_recall_curve`` / ``roc_curve`` /
  ``f1_score`` / ``confusion_matrix`` with ``sample_weight`` set to the weights, score ``-d``
  (a pair is predicted reached when ``d <= thr``);
* SciPy's ``mstats.mquantiles`` with ``alphap = betap = 1`` (Hyndman and Fan, 1996,
  definition 7) for the percentile interval.
"""

import json
import math
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy.stats import mstats
from sklearn.metrics import confusion_matrix, f1_score, precision_recall_curve, roc_curve

from goalkit.errors import TuningError
from goalkit.reward import RewardRule
from goalkit.thresholds.labels import LabelledPairs
from goalkit.thresholds.tuner import ThresholdTuner
from goalkit.thresholds.bootstrap import (bootstrap_threshold, dense_thresholds, group_counts,
                                          resample_groups)
from goalkit.thresholds.metrics import _run_ends, choose_threshold, sweep_thresholds
from goalkit.thresholds.segments import SegmentedPairs


def _per_resample(d, y, gi, counts, chooser, placement, inclusive):
    """Reference: each resample's pairs repeated by their weights, then one plain sweep."""
    out = []
    for c in counts:  # a loop over resamples (small test inputs)
        w = c[gi]
        dd, yy = np.repeat(d, w), np.repeat(y, w)
        try:
            ch = choose_threshold(sweep_thresholds(dd, yy), chooser, placement=placement, inclusive=inclusive)
            out.append(ch.threshold)
        except TuningError:  # no pairs, or no pairs of a label the chooser needs: undefined
            out.append(np.nan)
    return np.array(out)


@st.composite
def _resampled(draw):
    n_groups = draw(st.integers(1, 7))
    sizes = draw(st.lists(st.integers(1, 6), min_size=n_groups, max_size=n_groups))
    m = sum(sizes)
    d = np.array(draw(st.lists(st.integers(0, 8), min_size=m, max_size=m)), dtype=np.float64) / 4.0
    y = np.array(draw(st.lists(st.integers(0, 1), min_size=m, max_size=m)), dtype=np.int64)
    gi = np.repeat(np.arange(n_groups), sizes)
    b = draw(st.integers(1, 6))
    draws = np.array(draw(st.lists(st.integers(0, n_groups - 1), min_size=b * n_groups,
                                   max_size=b * n_groups))).reshape(b, n_groups)
    return d, y, gi, draws


@settings(max_examples=300, deadline=None)
@given(data=_resampled(), chooser=st.sampled_from(["max-f1", "youden"]),
       placement=st.sampled_from(["midpoint", "lower"]), inclusive=st.booleans())
def test_segments_equal_the_per_resample_computation(data, chooser, placement, inclusive):
    d, y, gi, draws = data
    n_groups = int(gi.max()) + 1
    counts = group_counts(draws, n_groups)
    order = np.argsort(d, kind="stable")
    ds, ys, gs = d[order], y[order], gi[order]
    ends = _run_ends(ds)
    got = SegmentedPairs(ys, gs, ends, n_groups).block(counts, ds[ends], chooser, placement, inclusive)
    want = _per_resample(d, y, gi, counts, chooser, placement, inclusive)
    np.testing.assert_array_equal(got, want)  # bit for bit, NaN where undefined
    dense = dense_thresholds(counts, ds, ys, gs, ends, ds[ends], chooser, None, placement, inclusive)
    np.testing.assert_array_equal(got, dense)


def _pairs(seed, n_groups=60):
    r = np.random.default_rng(seed)
    sizes = r.integers(5, 40, n_groups)
    g = np.repeat(np.arange(n_groups) * 7 + 3, sizes)     # episode ids, not positions
    y = (r.random(g.size) < 0.25).astype(np.int64)
    d = np.abs(np.where(y == 1, 0.02, 0.06) + np.repeat(r.normal(0, 0.01, n_groups), sizes)
               + r.normal(0, 0.015, g.size))
    return d, y, g


@pytest.mark.parametrize("seed", [0, 1])
def test_max_f1_resamples_reach_scikit_learns_best_weighted_f1(seed):
    d, y, g = _pairs(seed)
    iv = bootstrap_threshold(d, y, g, chooser="max-f1", n_resamples=40, seed=seed)
    _, gi = np.unique(g, return_inverse=True)
    counts = group_counts(resample_groups(iv.n_groups, 40, seed), iv.n_groups)
    for b in range(40):  # a loop over resamples
        w = counts[b][gi]
        prec, rec, score = precision_recall_curve(y, -d, sample_weight=w)  # thresholds on -d, ascending
        prec, rec = prec[:-1], rec[:-1]                # the last point (recall 0) has no threshold
        with np.errstate(invalid="ignore", divide="ignore"):
            f1 = np.where(prec + rec > 0, 2 * prec * rec / (prec + rec), 0.0)
        best = np.max(f1)
        thr = iv.distribution[b]
        assert f1_score(y, (d <= thr).astype(int), sample_weight=w) == pytest.approx(best, rel=1e-12)
        # ties go to the strictest rule: no smaller drawn distance reaches the same F1
        cand = d[(w > 0) & (d <= thr)].max()           # the drawn distance the choice was made at
        stricter = -score < cand
        if stricter.any():
            assert np.max(f1[stricter]) < best - 1e-12


@pytest.mark.parametrize("seed", [2, 3])
def test_youden_resamples_reach_scikit_learns_best_weighted_j(seed):
    d, y, g = _pairs(seed)
    iv = bootstrap_threshold(d, y, g, chooser="youden", n_resamples=40, seed=seed)
    _, gi = np.unique(g, return_inverse=True)
    counts = group_counts(resample_groups(iv.n_groups, 40, seed), iv.n_groups)
    for b in range(40):  # a loop over resamples
        w = counts[b][gi]
        fpr, tpr, _ = roc_curve(y, -d, sample_weight=w, drop_intermediate=False)
        (tn, fp), (fn, tp) = confusion_matrix(y, (d <= iv.distribution[b]).astype(int), sample_weight=w)
        assert tp / (tp + fn) - fp / (fp + tn) == pytest.approx(np.max(tpr - fpr), rel=1e-12, abs=1e-15)


def test_segment_path_equals_the_dense_sweep_with_undefined_resamples_and_any_block_size():
    d, y, g = _pairs(4, n_groups=30)
    y[g != g[0]] = 0                          # one episode holds every reached pair
    _, gi = np.unique(g, return_inverse=True)
    order = np.argsort(d, kind="stable")
    ends = _run_ends(d[order])
    counts = group_counts(resample_groups(30, 200, 9), 30)
    for chooser in ("max-f1", "youden"):
        a = bootstrap_threshold(d, y, g, chooser=chooser, n_resamples=200, seed=9)
        b = bootstrap_threshold(d, y, g, chooser=chooser, n_resamples=200, seed=9, max_cells=1)
        dense = dense_thresholds(counts, d[order], y[order], gi[order], ends, d[order][ends], chooser,
                                 None, "midpoint", True)
        assert a.distribution.tobytes() == b.distribution.tobytes() == dense.tobytes()
        assert 0 < a.n_undefined < 200        # resamples without the reached episode: no choice
        assert a.n_undefined == int(np.isnan(dense).sum())


def test_interval_is_scipys_type_7_quantile_of_the_finite_resamples():
    d, y, g = _pairs(5)
    iv = bootstrap_threshold(d, y, g, n_resamples=300, confidence=0.9, seed=1)
    finite = iv.distribution[np.isfinite(iv.distribution)]
    low, high = mstats.mquantiles(finite, prob=[0.05, 0.95], alphap=1.0, betap=1.0)
    assert (iv.low, iv.high) == (pytest.approx(low, rel=1e-12), pytest.approx(high, rel=1e-12))


def test_segments_collapse_runs_of_one_label():
    # ascending distances labelled 1 1 0 0 | mixed tie at 0.5 | 1 0: segments +, -, mixed, +, -
    d = np.array([0.1, 0.2, 0.3, 0.4, 0.5, 0.5, 0.6, 0.7])
    y = np.array([1, 1, 0, 0, 1, 0, 1, 0])
    g = np.array([0, 1, 0, 1, 0, 1, 0, 1])
    ends = _run_ends(d)
    s = SegmentedPairs(y, g, ends, 2)
    assert s.kind.tolist() == [1, 0, 2, 1, 0]
    assert s.candidates.tolist() == [0, 2, 3]
    assert s.seg_first_pair.tolist() == [0, 2, 4, 6, 7]
    assert s.seg_last_pair.tolist() == [1, 3, 5, 6, 7]


@pytest.mark.parametrize("rule", [RewardRule("euclidean", 0.05), RewardRule("box", (0.05, 0.05)),
                                  RewardRule("region", 0.0, lower=(-0.03, -math.inf), upper=(0.03, 0.02))])
def test_tuner_with_the_bootstrap_on_a_thread_gives_the_same_fit(rule):
    # what goalkit tune does (the bootstrap on a worker thread) against the plain call
    d, y, g = _pairs(6, n_groups=40)
    r = np.random.default_rng(6)
    achieved = np.c_[d * np.cos(r.uniform(0, 6.3, d.size)), d * np.sin(r.uniform(0, 6.3, d.size))]
    pairs = LabelledPairs(achieved, np.zeros_like(achieved), y.astype(bool), g, True, "made here")
    plain = ThresholdTuner(rule, n_resamples=120, seed=4).fit(pairs)
    with ThreadPoolExecutor(1) as pool:
        threaded = ThresholdTuner(rule, n_resamples=120, seed=4).fit(pairs, executor=pool)
        assert json.dumps(threaded.summary(), sort_keys=True) == json.dumps(plain.summary(), sort_keys=True)
    assert threaded.interval_.distribution.tobytes() == plain.interval_.distribution.tobytes()
    assert plain.interval_.low <= plain.interval_.high
