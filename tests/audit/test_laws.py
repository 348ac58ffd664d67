"""The audit's own formulas against outside references (scipy.spatial.distance, scipy.stats)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.spatial import distance as spd
from scipy.stats import binom, binomtest, chisquare, geom, kstest, norm, randint

from goalkit.audit.distances import rule_distance
from goalkit.audit.laws import geometric_law, uniform_law
from goalkit.audit.stattests import Check, count_bound_check, holm, share_power


@pytest.fixture
def pairs():
    gen = np.random.default_rng(0)
    return gen.normal(size=(40, 3)), gen.normal(size=(40, 3)), np.array([0.5, 2.0, 1.0])


def test_distances_match_scipy(pairs):
    # docs/reward.md: weights multiply the squared difference (euclidean) and the absolute
    # difference (l1), as scipy.spatial.distance.euclidean / cityblock with w
    a, g, w = pairs
    for kind, ref in (("euclidean", spd.euclidean), ("l1", spd.cityblock), ("cosine", spd.cosine)):
        want = [ref(x, y, w) for x, y in zip(a, g)]
        np.testing.assert_allclose(rule_distance(kind, a, g, weights=w), want, rtol=1e-12)
        want = [ref(x, y) for x, y in zip(a, g)]
        np.testing.assert_allclose(rule_distance(kind, a, g), want, rtol=1e-12)
    # scipy's chebyshev uses weights only as a 0/1 mask, so compare with 0/1 weights
    mask = np.array([1.0, 0.0, 1.0])
    np.testing.assert_allclose(rule_distance("chebyshev", a, g, weights=mask),
                               [spd.chebyshev(x, y, mask) for x, y in zip(a, g)], rtol=1e-12)
    tol = np.array([0.1, 0.2, 0.4])   # box: the largest per-dimension |difference| / tolerance
    np.testing.assert_allclose(rule_distance("box", a, g, threshold=tol),
                               [spd.chebyshev(x / tol, y / tol) for x, y in zip(a, g)], rtol=1e-12)


def test_cosine_zero_vectors_follow_the_docs():
    z, x = np.zeros((1, 2)), np.ones((1, 2))
    assert rule_distance("cosine", z, z)[0] == 0.0 and rule_distance("cosine", z, x)[0] == 1.0


@pytest.mark.parametrize("past_end", ["clip", "truncate"])
@pytest.mark.parametrize("room", [1, 2, 7, 40])
def test_geometric_law_matches_scipy_geom(past_end, room):
    gamma = 0.8
    k = np.arange(1, room + 1)
    lo = geometric_law(k, np.full(room, room), gamma, past_end, np.zeros(room)).pit
    hi = geometric_law(k, np.full(room, room), gamma, past_end, np.full(room, 1 - 1e-15)).pit
    pmf = geom.pmf(k, 1 - gamma)   # scipy.stats.geom: P(K = k) = (1 - p)^(k-1) p on {1, 2, ...}
    if past_end == "clip":
        pmf[-1] = geom.sf(room - 1, 1 - gamma)      # everything from `room` on lands on room
    else:
        pmf = pmf / geom.cdf(room, 1 - gamma)       # conditioned on K <= room
    np.testing.assert_allclose(hi - lo, pmf, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(lo, np.concatenate([[0.0], np.cumsum(pmf)[:-1]]), atol=1e-12)
    rows = geometric_law(k, np.full(room, room), gamma, past_end, np.zeros(room))
    assert rows.p_low[0] == pytest.approx(pmf[0]) and rows.p_high[0] == pytest.approx(pmf[-1])
    assert rows.p_same[0] == pytest.approx(np.sum(pmf ** 2))


def test_uniform_law_matches_scipy_randint():
    x = np.arange(3, 10)
    rows = uniform_law(x, 3, 9, np.zeros(7))
    np.testing.assert_allclose(rows.pit, randint.cdf(x - 1, 3, 10))
    assert np.isnan(uniform_law(np.array([2, 10]), 3, 9, np.zeros(2)).pit).all()


def test_randomised_pit_is_uniform_under_the_law():
    # draws from scipy.stats.geom, clipped at the room as past_end = "clip" documents
    gen = np.random.default_rng(1)
    room = gen.integers(1, 30, 20000)
    k = np.minimum(geom.rvs(0.25, size=20000, random_state=gen), room)
    pit = geometric_law(k, room, 0.75, "clip", gen.random(20000)).pit
    assert kstest(pit, "uniform").pvalue > 1e-3
    # and the off-by-one law (K - 1, floored at 1) is far from uniform
    bad = geometric_law(np.maximum(k - 1, 1), room, 0.75, "clip", gen.random(20000)).pit
    assert kstest(bad, "uniform").pvalue < 1e-12


@pytest.mark.parametrize("n,p", [(50, 0.02), (400, 0.1), (5000, 0.3), (30, 0.9)])
def test_count_bound_is_above_the_exact_binomial_tail(n, p):
    # a valid p-value: never below twice the exact one-sided binomial tail (scipy.stats.binom)
    mu = n * p
    for a in range(0, n + 1, max(1, n // 200)):
        c = count_bound_check("x", a, [p], [n], "rows")
        exact = binom.cdf(a, n, p) if a < mu else binom.sf(a - 1, n, p)
        assert c.p_value >= min(1.0, 2 * exact) * (1 - 1e-6)
    # and not much above it far in the tail (Chernoff: within a factor polynomial in n)
    a = int(mu + 6 * math.sqrt(mu * (1 - p)) + 1)
    if a <= n:
        c = count_bound_check("x", a, [p], [n], "rows")
        assert c.p_value <= 2 * binom.sf(a - 1, n, p) * 10 * n


def test_count_bound_with_mixed_probabilities_against_simulation():
    # two groups of events; the exact tail by convolving two scipy.stats.binom pmfs
    probs, counts = [0.5, 0.02], [40, 2000]
    pmf = np.convolve(binom.pmf(np.arange(41), 40, 0.5), binom.pmf(np.arange(2001), 2000, 0.02))
    for a in (0, 20, 35, 60, 90, 120):
        c = count_bound_check("x", a, probs, counts, "rows")
        exact = pmf[:a + 1].sum() if a < 60 else pmf[a:].sum()
        assert c.p_value >= min(1.0, 2 * exact) * (1 - 1e-6)


def test_count_bound_size_under_the_null():
    gen = np.random.default_rng(2)
    p = gen.uniform(0.001, 0.2, 3000)
    ps = [count_bound_check("x", int((gen.random(3000) < p).sum()), p, np.ones(3000), "rows").p_value
          for _ in range(200)]
    assert np.mean(np.array(ps) <= 0.05) <= 0.05


def test_holm_step_down():
    # Holm (1979): the i-th smallest p-value against alpha / (m - i), stop at the first keep
    checks = [Check(str(i), "t", 0.0, p) for i, p in enumerate([0.01, 0.04, 0.03, 0.005])]
    out = holm(checks, 0.05)
    assert [c.passed for c in out] == [False, True, True, False]
    assert [c.threshold for c in out] == pytest.approx([0.05 / 3, 0.05 / 1, 0.05 / 2, 0.05 / 4])


def test_share_power_is_the_90_percent_point():
    n, share, level = 100_000, 0.2, 1e-6 / 25
    d = share_power(n, share, level)
    lo = binom.ppf(level / 2, n, share) - 1
    hi = binom.isf(level / 2, n, share) + 1
    assert binomtest(int(hi), n, share).pvalue <= level and binomtest(int(lo), n, share).pvalue <= level

    def power(q):
        return binom.cdf(lo, n, q) + binom.sf(hi - 1, n, q)

    assert power(share + d) >= 0.9 > power(share + d - 1e-4)
    # normal approximation of the same (common practice): (z_(1-level/2) + z_0.9) sqrt(p(1-p)/n)
    approx = (norm.isf(level / 2) + norm.isf(0.1)) * math.sqrt(share * (1 - share) / n)
    assert d == pytest.approx(approx, rel=0.05)


def test_the_help_quotes_the_computed_power():
    from goalkit.audit.run import share_power_note
    from goalkit.write.command import SAMPLE_POWER_NOTE

    assert SAMPLE_POWER_NOTE == f"{share_power_note():.4f}"


def test_chisquare_bins_of_a_fine_histogram():
    from goalkit.audit.stattests import uniform_chi2_check

    fine = np.full(1000, 3)
    c = uniform_chi2_check("x", fine, "rows")
    assert c.test.startswith("chi-square, 50") and c.p_value == pytest.approx(chisquare(np.full(50, 60)).pvalue)
    assert uniform_chi2_check("x", np.ones(1000, int) * 0, "rows") is None


def test_count_bound_with_certain_events():
    # ten events of probability 1 must all happen; the rest follow Binomial(10, 0.5)
    assert count_bound_check("x", 5, [1.0, 0.5], [10, 10], "rows").p_value == 0.0
    assert count_bound_check("x", 15, [1.0, 0.5], [10, 10], "rows").p_value == 1.0
    c = count_bound_check("x", 20, [1.0, 0.5], [10, 10], "rows")
    assert 2 * binom.sf(9, 10, 0.5) * (1 - 1e-9) <= c.p_value < 0.05   # at a = n the bound is exact
