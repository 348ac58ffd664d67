"""The threshold sweep and its summaries against scikit-learn, plus closed-form cases.

Outside references:
* scikit-learn 1.x ``sklearn.metrics`` (roc_auc_score, roc_curve, average_precision_score,
  precision_recall_curve, f1_score, confusion_matrix), with score = -distance because a
  smaller distance means "more likely reached".
* Youden (1950), "Index for rating diagnostic tests", Cancer 3(1): J = sensitivity +
  specificity - 1 = TPR - FPR.
"""

import numpy as np
import pytest
from scipy.stats import norm
from sklearn.metrics import (average_precision_score, confusion_matrix, f1_score,
                             precision_recall_curve, roc_auc_score, roc_curve)

from goalkit.errors import TuningError
from goalkit.thresholds.metrics import choose_threshold, sweep_thresholds


def _labelled(seed, n=400, ties=True):
    r = np.random.default_rng(seed)
    y = (r.random(n) < 0.35).astype(int)
    d = np.abs(np.where(y == 1, r.normal(0.3, 0.2, n), r.normal(0.7, 0.3, n)))
    if ties:
        d = np.round(d, 1)  # many tied distances: ties must be handled like scikit-learn does
    return d, y


@pytest.mark.parametrize("seed,ties", [(0, True), (1, False), (2, True)])
def test_roc_auc_and_average_precision_match_sklearn(seed, ties):
    d, y = _labelled(seed, ties=ties)
    s = sweep_thresholds(d, y)
    # scikit-learn: roc_auc_score / average_precision_score with y_score = -d
    assert s.roc_auc() == pytest.approx(roc_auc_score(y, -d), abs=1e-12)
    assert s.average_precision() == pytest.approx(average_precision_score(y, -d), abs=1e-12)


def test_curves_match_sklearn_point_by_point():
    d, y = _labelled(3)
    s = sweep_thresholds(d, y)
    # precision_recall_curve returns increasing score thresholds (= decreasing distance) and a
    # final (precision 1, recall 0) point without threshold; reverse to our ascending order.
    p, r, t = precision_recall_curve(y, -d)
    np.testing.assert_allclose(-t[::-1], s.thresholds, rtol=0, atol=0)
    np.testing.assert_allclose(p[:-1][::-1], s.precision, rtol=1e-15)
    np.testing.assert_allclose(r[:-1][::-1], s.recall, rtol=1e-15)
    fpr, tpr, thr = roc_curve(y, -d, drop_intermediate=False)
    ours_fpr, ours_tpr = s.roc_curve()
    np.testing.assert_allclose(fpr, ours_fpr, rtol=1e-15)
    np.testing.assert_allclose(tpr, ours_tpr, rtol=1e-15)
    np.testing.assert_array_equal(-thr[1:], s.thresholds)


def test_f1_and_confusion_counts_match_sklearn_at_every_threshold():
    d, y = _labelled(4, n=150)
    s = sweep_thresholds(d, y)
    assert s.thresholds.size > 3
    for k, thr in enumerate(s.thresholds.tolist()):
        pred = (d <= thr).astype(int)          # the inclusive rule
        np.testing.assert_array_equal(s.confusion(k), confusion_matrix(y, pred, labels=[0, 1]))
        assert s.f1[k] == pytest.approx(f1_score(y, pred), abs=1e-15)


def test_at_evaluates_any_threshold_inclusive_and_exclusive():
    d, y = _labelled(5, n=120)
    s = sweep_thresholds(d, y)
    for thr in (0.0, 0.2, 0.25, 0.5, 10.0):
        for inclusive in (True, False):
            pred = (d <= thr) if inclusive else (d < thr)
            got = s.at(thr, inclusive)
            tn, fp, fn, tp = confusion_matrix(y, pred.astype(int), labels=[0, 1]).ravel()
            assert (got["tp"], got["fp"], got["fn"], got["tn"]) == (tp, fp, fn, tn)


# ---- closed-form cases -------------------------------------------------------------------
def test_separated_distributions_any_threshold_between_gives_f1_one():
    # Positives uniform on [0, a], negatives uniform on [b, c], a < b. Every threshold in
    # [max positive, min negative) classifies perfectly, so F1 = 1, J = 1 and precision 1
    # (population version: any threshold in [a, b)). Invented data, closed-form answer.
    r = np.random.default_rng(10)
    a, b, c = 0.04, 0.10, 0.60
    pos, neg = r.uniform(0, a, 300), r.uniform(b, c, 500)
    d = np.r_[pos, neg]
    y = np.r_[np.ones(300, int), np.zeros(500, int)]
    s = sweep_thresholds(d, y)
    lo, hi = pos.max(), neg.min()
    for chooser, kw in (("max-f1", {}), ("youden", {}), ("target-precision", {"target": 1.0})):
        for placement in ("midpoint", "lower"):
            ch = choose_threshold(s, chooser, placement=placement, **kw)
            assert ch.candidate == lo  # the largest positive distance
            assert lo <= ch.threshold < hi
            assert (ch.f1, ch.precision, ch.recall, ch.fpr, ch.youden) == (1.0, 1.0, 1.0, 0.0, 1.0)
            assert 0 <= lo <= a and ch.threshold < b
    assert choose_threshold(s, "max-f1").threshold == pytest.approx((lo + hi) / 2, rel=1e-15)
    assert s.roc_auc() == 1.0 and s.average_precision() == 1.0


def test_equal_variance_normals_youden_threshold_is_the_midpoint():
    # Reached distances ~ N(m0, s^2), not reached ~ N(m1, s^2), m0 < m1.
    # J(t) = Phi((t - m0)/s) - Phi((t - m1)/s); J'(t) = [phi((t-m0)/s) - phi((t-m1)/s)] / s = 0
    # <=> (t - m0)^2 = (t - m1)^2 <=> t* = (m0 + m1) / 2, and J'' < 0 there, so t* is the
    # maximum with J* = 2 Phi((m1 - m0) / (2 s)) - 1. We use a stratified sample (normal
    # quantiles at (i + 1/2)/n), whose empirical CDF is within 1/n of Phi everywhere.
    m0, m1, sd, n = 3.0, 5.0, 0.5, 20000
    z = norm.ppf((np.arange(n) + 0.5) / n)
    d = np.r_[m0 + sd * z, m1 + sd * z]
    y = np.r_[np.ones(n, int), np.zeros(n, int)]
    ch = choose_threshold(sweep_thresholds(d, y), "youden")
    j_star = 2 * norm.cdf((m1 - m0) / (2 * sd)) - 1
    assert ch.youden == pytest.approx(j_star, abs=2.0 / n)
    # J is flat at the top (J''(t*) = -4 phi(2) / s^2), so the argmax is where the
    # 2/n-wide band of J around J* sits: |t - t*| <= sqrt(2 * (2/n) / |J''|) ~ 0.015.
    jpp = 4 * norm.pdf((m1 - m0) / (2 * sd)) / sd**2
    assert abs(ch.threshold - (m0 + m1) / 2) <= np.sqrt(2 * (2.0 / n) / jpp)


def test_target_precision_is_the_largest_threshold_meeting_it():
    d, y = _labelled(6, n=300, ties=False)
    s = sweep_thresholds(d, y)
    target = 0.8
    ch = choose_threshold(s, "target-precision", target=target)
    ok = np.flatnonzero(s.precision >= target)
    assert ch.index == ok.max() and ch.precision >= target
    assert np.all(s.precision[ch.index + 1:] < target)
    with pytest.raises(TuningError, match="no threshold reaches precision"):
        choose_threshold(sweep_thresholds([0.1, 0.2], [0, 1]), "target-precision", target=0.9)


def test_exclusive_rule_placement_keeps_the_counts():
    d = np.array([0.1, 0.2, 0.2, 0.5, 0.9])
    y = np.array([1, 1, 1, 0, 0])
    s = sweep_thresholds(d, y)
    for placement in ("midpoint", "lower"):
        thr = choose_threshold(s, "max-f1", placement=placement, inclusive=False).threshold
        assert np.array_equal(d < thr, y.astype(bool))
    # the largest candidate has no next one: exclusive rule gets the next float up
    s1 = sweep_thresholds([0.3, 0.3], [1, 1])
    ch = choose_threshold(s1, "max-f1", inclusive=False)
    assert ch.threshold == np.nextafter(0.3, 1.0) and 0.3 < ch.threshold


def test_bad_input_names_what_is_wrong():
    with pytest.raises(TuningError, match="label 0 or 1"):
        sweep_thresholds([0.1, 0.2], [0, 2])
    with pytest.raises(TuningError, match="finite distances"):
        sweep_thresholds([0.1, np.nan], [0, 1])
    with pytest.raises(TuningError, match="shape"):
        sweep_thresholds([0.1, 0.2], [0, 1, 1])
    with pytest.raises(TuningError, match="unknown chooser"):
        choose_threshold(sweep_thresholds([0.1], [1]), "best")
    with pytest.raises(TuningError, match="both labels"):
        sweep_thresholds([0.1, 0.2], [1, 1]).roc_auc()
