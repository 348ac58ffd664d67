"""Scores against outside references: scipy.stats.spearmanr, sklearn.metrics.roc_auc_score and
scipy.stats.bootstrap (percentile method) on the same resamples (the same numpy Generator)."""

import numpy as np
import pytest
import scipy.stats as ss
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import roc_auc_score

from goalkit.scoring import metrics


@pytest.mark.filterwarnings("ignore::scipy.stats.ConstantInputWarning")
@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(-3, 3), st.integers(-3, 3), st.integers(0, 1)), min_size=3, max_size=40))
def test_spearman_and_auc_equal_scipy_and_sklearn_with_ties(rows):
    x, y, lab = (np.array(c, dtype=float) for c in zip(*rows))
    ref = ss.spearmanr(x, y).statistic
    ours = metrics.spearman(x, y)
    if np.isnan(ref):
        assert np.isnan(ours)
    else:
        assert ours == pytest.approx(ref, abs=1e-12)
    if 0 < lab.sum() < len(lab):
        assert metrics.roc_auc(x, lab) == pytest.approx(roc_auc_score(lab, x), abs=1e-12)
    else:
        assert np.isnan(metrics.roc_auc(x, lab))


def _data(seed=0, n=400, g=25):
    r = np.random.default_rng(seed)
    group = np.sort(r.integers(0, g, n))
    x = r.integers(0, 6, n).astype(float)
    y = x + r.normal(size=n)
    label = (r.random(n) < 0.3).astype(int)
    return x, y, label, group, g


def _expand(idx, group):
    return np.concatenate([np.flatnonzero(group == e) for e in idx])


@pytest.mark.parametrize("closed_form", [True, False])
@pytest.mark.parametrize("kind", ["mean", "spearman", "auc"])
def test_bootstrap_interval_equals_scipy_bootstrap_on_the_same_resamples(kind, closed_form, monkeypatch):
    if not closed_form:  # rank every resample's rows again instead of the closed form over episodes
        monkeypatch.setattr(metrics, "CLOSED_FORM_MAX_GROUPS", 0)
    x, y, label, group, g = _data()
    b, seed = 400, 11

    def statistic(idx, axis=-1):  # the statistic on the expanded rows of the drawn episodes
        out = []
        for row in np.atleast_2d(idx):
            rows = _expand(row, group)
            if kind == "mean":
                out.append(y[rows].mean())
            elif kind == "spearman":
                out.append(ss.spearmanr(x[rows], y[rows]).statistic)
            else:
                out.append(roc_auc_score(label[rows], y[rows]))
        return np.array(out)

    ref = ss.bootstrap((np.arange(g),), statistic, vectorized=True, n_resamples=b, method="percentile",
                       confidence_level=0.9, rng=np.random.default_rng(seed)).confidence_interval
    draws = np.random.default_rng(seed).integers(0, g, (b, g))  # what scipy draws (one sample of size g)
    if kind == "mean":
        iv = metrics.mean_by_group_interval(y, group, g, draws, 0.9)[0]
    elif kind == "spearman":
        iv = metrics.rank_stat_interval(metrics.spearman_weighted, x, y, group, g, draws, 0.9)
    else:
        iv = metrics.rank_stat_interval(metrics.roc_auc_weighted, y, label, group, g, draws, 0.9)
    assert (iv.low, iv.high) == pytest.approx((ref.low, ref.high), abs=1e-12)


def test_random_scores_are_at_chance_within_their_intervals():
    r = np.random.default_rng(5)
    n, g = 3000, 60
    group = np.sort(r.integers(0, g, n))
    label = (r.random(n) < 0.4).astype(int)
    horizon = r.integers(1, 50, n).astype(float)
    value = r.normal(size=n)
    draws = metrics.draw_episodes(g, 1000, seed=0)
    auc = metrics.rank_stat_interval(metrics.roc_auc_weighted, value, label, group, g, draws, 0.95)
    rho = metrics.rank_stat_interval(metrics.spearman_weighted, value, -horizon, group, g, draws, 0.95)
    assert auc.low <= 0.5 <= auc.high and auc.high - auc.low < 0.1
    assert rho.low <= 0.0 <= rho.high and rho.high - rho.low < 0.1


def test_draws_are_a_pure_function_of_the_seed():
    a = metrics.draw_episodes(7, 50, seed=3)
    assert a.shape == (50, 7) and a.min() >= 0 and a.max() < 7
    np.testing.assert_array_equal(a, metrics.draw_episodes(7, 50, seed=3))
    np.testing.assert_array_equal(a[:20], metrics.draw_episodes(7, 20, seed=3))
    assert not np.array_equal(a, metrics.draw_episodes(7, 50, seed=4))


def test_difference_interval_is_on_the_same_resamples():
    x, y, label, group, g = _data(1)
    draws = np.random.default_rng(0).integers(0, g, (300, g))
    other = -x
    d = metrics.rank_stat_difference(metrics.spearman_weighted, x, other, y, group, g, draws, 0.95)
    a = metrics.spearman(x, y)
    assert d.estimate == pytest.approx(2 * a)  # rho(-x, y) = -rho(x, y)
    one = metrics.rank_stat_interval(metrics.spearman_weighted, x, y, group, g, draws, 0.95)
    assert (d.low, d.high) == pytest.approx((2 * one.low, 2 * one.high))


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 8), st.integers(1, 5))
def test_closed_form_equals_ranking_every_resample(seed, g, levels):
    r = np.random.default_rng(seed)
    n = int(r.integers(2, 60))
    group = r.integers(0, g, n)
    x = r.integers(0, levels, n).astype(float)
    y = r.integers(0, levels, n).astype(float)
    label = r.integers(0, 2, n)
    counts = metrics.draw_counts(r.integers(0, g, (30, g)), g)
    for stat, b in ((metrics.spearman_weighted, y), (metrics.roc_auc_weighted, label)):
        fast = metrics._closed_form(stat, x, b, group, g, counts)
        slow = stat(x, b, counts[:, group])
        np.testing.assert_array_equal(np.isnan(fast), np.isnan(slow))
        np.testing.assert_allclose(fast[~np.isnan(fast)], slow[~np.isnan(slow)], atol=1e-9)
