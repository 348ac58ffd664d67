"""Hypothesis properties of the threshold sweep and the choosers (definitions checked by brute force)."""

import numpy as np
from hypothesis import given, settings, strategies as st

from goalkit.thresholds.metrics import choose_threshold, sweep_thresholds

values = st.sampled_from([0.0, 0.05, 0.1, 0.25, 0.3, 1.0, 2.5])
pairs = st.integers(1, 40).flatmap(lambda n: st.tuples(
    st.lists(st.one_of(values, st.floats(0, 10, allow_nan=False)), min_size=n, max_size=n),
    st.lists(st.integers(0, 1), min_size=n, max_size=n)))


@settings(max_examples=150, deadline=None)
@given(pairs)
def test_counts_add_up_and_rates_are_monotone(p):
    d, y = np.array(p[0], dtype=float), np.array(p[1])
    s = sweep_thresholds(d, y)
    assert np.all(np.diff(s.thresholds) > 0)                    # distinct, ascending
    np.testing.assert_array_equal(s.thresholds, np.unique(d))
    assert np.all(s.tp + s.fp + s.fn + s.tn == d.size)
    assert s.n_pos == y.sum() and s.n_neg == d.size - y.sum()
    assert np.all(np.diff(s.tp) >= 0) and np.all(np.diff(s.fp) >= 0)
    assert np.all(np.diff(s.tp + s.fp) > 0)                     # every candidate admits new pairs
    assert s.tp[-1] == s.n_pos and s.fp[-1] == s.n_neg
    if s.n_pos:
        assert np.all(np.diff(s.tpr) >= 0)
    if s.n_neg:
        assert np.all(np.diff(s.fpr) >= 0)
    for k, thr in enumerate(s.thresholds):                      # brute force of the definition
        pred = d <= thr
        assert s.tp[k] == np.sum(pred & (y == 1)) and s.fp[k] == np.sum(pred & (y == 0))
    if s.n_pos and s.n_neg:
        assert 0.0 <= s.roc_auc() <= 1.0 and 0.0 < s.average_precision() <= 1.0


@settings(max_examples=150, deadline=None)
@given(pairs)
def test_choosers_pick_the_first_best_candidate(p):
    d, y = np.array(p[0], dtype=float), np.array(p[1])
    s = sweep_thresholds(d, y)
    if s.n_pos == 0:
        return
    ch = choose_threshold(s, "max-f1", placement="lower")
    assert ch.index == int(np.argmax(s.f1)) and ch.f1 == s.f1.max()
    assert ch.threshold == s.thresholds[ch.index]
    if s.n_neg:
        j = s.tpr - s.fpr
        cj = choose_threshold(s, "youden")
        assert abs(j[cj.index] - j.max()) < 1e-12
        assert np.all(j[:cj.index] < j.max() - 1e-12) or cj.index == 0
    # midpoint placement lands strictly between the candidate and the next one
    cm = choose_threshold(s, "max-f1")
    k = cm.index
    if k + 1 < s.thresholds.size:
        assert s.thresholds[k] <= cm.threshold < s.thresholds[k + 1]
        assert np.array_equal(d <= cm.threshold, d <= s.thresholds[k])
