"""The episode bootstrap against scipy.stats.bootstrap (SciPy >= 1.9, percentile method).

What makes the comparison exact: scipy draws the resamples (of *episode positions*, the
data we hand it) with its own generator and calls our statistic once per resample, in
order, with ``vectorized=False``. The statistic records the drawn positions and computes
the chosen threshold the direct way: concatenate the pairs of the drawn episodes (an
episode drawn twice appears twice) and run sweep + chooser on them. We then hand the
recorded draws to ``bootstrap_threshold(resamples=...)``, which evaluates them through its
own path (weighted sweeps over one sort). Same resamples, same statistic computed two
independent ways, so the bootstrap distributions must be identical; scipy's percentile
interval uses the same quantile definition (``stats.quantile``, method "linear" =
Hyndman and Fan 1996 definition 7) as ours, so the intervals must agree to rounding.
"""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy import stats

from goalkit.errors import TuningError
from goalkit.thresholds.bootstrap import bootstrap_threshold, resample_groups
from goalkit.thresholds.metrics import choose_threshold, sweep_thresholds


def _episodes(seed, n_groups=25):
    r = np.random.default_rng(seed)
    sizes = r.integers(3, 12, n_groups)
    g = np.repeat(r.permutation(1000)[:n_groups], sizes)   # arbitrary episode ids
    offset = np.repeat(r.normal(0, 0.1, n_groups), sizes)  # episodes differ: correlated pairs
    y = (r.random(g.size) < 0.4).astype(int)
    d = np.abs(np.where(y == 1, 0.3, 0.8) + offset + r.normal(0, 0.2, g.size))
    return np.round(d, 3), y, g


def _direct(d, y, g, picks, chooser, **kw):
    ids = np.unique(g)
    rows = np.concatenate([np.flatnonzero(g == ids[p]) for p in picks])
    ch = choose_threshold(sweep_thresholds(d[rows], y[rows]), chooser, **kw)
    return ch.threshold


@pytest.mark.parametrize("chooser,kw", [("max-f1", {}), ("youden", {}),
                                        ("max-f1", {"placement": "lower", "inclusive": False})])
def test_matches_scipy_bootstrap_on_the_same_resamples(chooser, kw):
    d, y, g = _episodes(0)
    n_groups = np.unique(g).size
    seen = []

    def statistic(positions):
        picks = positions.astype(np.int64)
        seen.append(picks.copy())
        return _direct(d, y, g, picks, chooser, **kw)

    res = stats.bootstrap((np.arange(n_groups),), statistic, n_resamples=300, vectorized=False,
                          method="percentile", confidence_level=0.9, rng=np.random.default_rng(7))
    draws = np.array(seen)
    assert draws.shape == (300, n_groups)  # exactly one call per resample
    ours = bootstrap_threshold(d, y, g, chooser=chooser, n_resamples=0, confidence=0.9,
                               resamples=draws, **{k: v for k, v in kw.items()})
    assert ours.n_undefined == 0
    np.testing.assert_array_equal(ours.distribution, res.bootstrap_distribution)
    assert ours.low == pytest.approx(res.confidence_interval.low, rel=1e-12)
    assert ours.high == pytest.approx(res.confidence_interval.high, rel=1e-12)


def test_seeded_draws_are_byte_stable_across_block_sizes_and_runs():
    d, y, g = _episodes(1)
    a = bootstrap_threshold(d, y, g, n_resamples=64, seed=5)
    b = bootstrap_threshold(d, y, g, n_resamples=64, seed=5, max_cells=1)  # one resample per block
    c = bootstrap_threshold(d, y, g, n_resamples=64, seed=6)
    assert a.distribution.tobytes() == b.distribution.tobytes()
    assert (a.low, a.high) == (b.low, b.high)
    assert a.distribution.tobytes() != c.distribution.tobytes()
    # the draws are a pure function of (seed, resample, position): a later block is a slice
    np.testing.assert_array_equal(resample_groups(9, 5, seed=5, start=3), resample_groups(9, 8, seed=5)[3:])


def test_undefined_resamples_are_dropped_and_counted():
    # Three episodes, only one has a reached pair: resamples missing it have no choice.
    d = np.array([0.1, 0.2, 0.6, 0.7, 0.8, 0.9])
    y = np.array([1, 0, 0, 0, 0, 0])
    g = np.array([0, 0, 1, 1, 2, 2])
    draws = np.array([[0, 1, 2], [1, 1, 2], [2, 2, 2], [0, 0, 0]])
    iv = bootstrap_threshold(d, y, g, resamples=draws)
    assert iv.n_undefined == 2
    assert np.isnan(iv.distribution[1]) and np.isnan(iv.distribution[2])
    assert iv.distribution[0] == _direct(d, y, g, [0, 1, 2], "max-f1")
    assert iv.distribution[3] == _direct(d, y, g, [0, 0, 0], "max-f1")


@settings(max_examples=60, deadline=None)
@given(st.data())
def test_weighted_path_equals_concatenation(data):
    n = data.draw(st.integers(2, 30))
    d = np.array(data.draw(st.lists(st.sampled_from([0.0, 0.1, 0.2, 0.3, 0.5, 0.8]), min_size=n, max_size=n)))
    y = np.array(data.draw(st.lists(st.integers(0, 1), min_size=n, max_size=n)))
    g = np.array(data.draw(st.lists(st.integers(0, 4), min_size=n, max_size=n)))
    n_groups = np.unique(g).size
    draws = np.array(data.draw(st.lists(st.lists(st.integers(0, n_groups - 1), min_size=n_groups,
                                                 max_size=n_groups), min_size=1, max_size=4)))
    chooser = data.draw(st.sampled_from(["max-f1", "youden", "target-precision"]))
    placement = data.draw(st.sampled_from(["midpoint", "lower"]))
    kw = {"target": 0.7} if chooser == "target-precision" else {}
    iv = bootstrap_threshold(d, y, g, chooser=chooser, placement=placement, resamples=draws, **kw)
    for b, picks in enumerate(draws):
        try:
            want = _direct(d, y, g, picks, chooser, placement=placement, **kw)
        except TuningError:  # undefined choice on this resample
            want = np.nan
        np.testing.assert_array_equal(iv.distribution[b], want)
