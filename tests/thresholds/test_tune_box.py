"""Box tolerance suggestions: closed forms for uniform differences, and minimality.

Closed forms (invented data, derivations here): if reached pairs have independent
|delta_d| ~ Uniform(0, w_d), the q-quantile of |delta_d| is q w_d; a box tol_d admits a
fraction prod_d min(1, tol_d / w_d) of them, so the box of shape w scaled to admit a
fraction r has tol_d = r**(1/G) w_d.
"""

import numpy as np
import pytest

from goalkit.errors import TuningError
from goalkit.thresholds.box import suggest_box


def _uniform_pairs(n=2000, widths=(0.02, 0.1), seed=0):
    r = np.random.default_rng(seed)
    grid = (np.arange(n) + 0.5) / n                       # stratified: empirical CDF within 1/n
    delta = np.stack([w * r.permutation(grid) for w in widths], axis=1)
    sign = r.choice([-1.0, 1.0], size=delta.shape)
    goal = r.normal(size=delta.shape)
    neg = goal[:200] + np.array(widths) * 3.0             # clearly outside any sensible box
    achieved = np.r_[goal + sign * delta, neg]
    goals = np.r_[goal, goal[:200]]
    labels = np.r_[np.ones(n, int), np.zeros(200, int)]
    return achieved, goals, labels, np.array(widths)


def test_quantile_method_matches_uniform_quantiles():
    a, g, y, w = _uniform_pairs()
    s = suggest_box(a, g, y, method="quantile", quantile=0.9)
    np.testing.assert_allclose(s.tolerances, 0.9 * w, atol=float(w.max()) / 1000)
    assert s.recall == pytest.approx(0.9 ** 2, abs=0.04)    # independent dimensions: q**G
    assert s.false_accept == 0.0 and s.precision == 1.0


def test_recall_method_is_the_closed_form_and_minimal():
    a, g, y, w = _uniform_pairs()
    s = suggest_box(a, g, y, method="recall", recall=0.81, quantile=0.5)
    np.testing.assert_allclose(np.array(s.tolerances) / w, np.sqrt(0.81), atol=0.02)
    assert s.recall >= 0.81
    delta = np.abs(a - g)[y == 1]
    shrunk = np.array(s.tolerances) * (1 - 1e-9)
    assert np.mean(np.all(delta <= shrunk, axis=1)) < 0.81  # any smaller box of this shape misses it


def test_dimension_where_no_reached_pair_differs_gets_a_fallback():
    a = np.array([[0.1, 0.0], [0.05, 0.0], [0.5, 0.3], [0.0, 0.2]])
    s = suggest_box(a, np.zeros_like(a), [1, 1, 0, 0], method="quantile", quantile=1.0)
    assert s.tolerances == (0.1, 0.1)                   # half of the smallest non-zero 0.2
    assert "dimension 1" in s.notes[0]
    assert s.recall == 1.0 and s.false_accept == 0.0
    with pytest.raises(TuningError, match="at least one pair labelled reached"):
        suggest_box(a, np.zeros_like(a), [0, 0, 0, 0])


def test_a_masked_out_dimension_never_widens_the_suggested_box():
    # Invented pairs: dimension 0 decides success, dimension 1 is noise that the tasks'
    # masks leave out. With the masks, a left-out dimension's difference counts as 0, so the
    # suggestion equals suggest_box run directly on pairs with that difference zeroed.
    from goalkit.reward import RewardRule
    from goalkit.thresholds.labels import LabelledPairs
    from goalkit.thresholds.tuner import ThresholdTuner

    rng = np.random.default_rng(4)
    m = 400
    goal = np.zeros((m, 2))
    achieved = np.column_stack([rng.uniform(0, 0.2, m), rng.normal(0, 1.0, m)])
    reached = achieved[:, 0] <= 0.05
    mask = np.tile(np.array([1, 0], np.uint8), (m, 1))
    pairs = LabelledPairs(achieved, goal, reached, np.arange(m), False, "test", mask)
    rule = RewardRule("box", (0.05, 0.05))
    tuned = ThresholdTuner(rule, n_resamples=50).fit(pairs)
    zeroed = achieved.copy()
    zeroed[:, 1] = 0.0
    expected = suggest_box(zeroed, goal, reached, method="recall", recall=0.95)
    assert tuned.box_.tolerances == expected.tolerances
    unmasked = ThresholdTuner(rule, n_resamples=50).fit(
        LabelledPairs(achieved, goal, reached, np.arange(m), False, "test"))
    assert unmasked.box_.tolerances[1] != tuned.box_.tolerances[1]   # the noise did widen it there
