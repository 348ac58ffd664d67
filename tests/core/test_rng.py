"""Counter-based randomness: uniform, addressable, chunk-independent."""

import numpy as np
from hypothesis import given, settings, strategies as st
from scipy import stats

from goalkit import rng
from goalkit.demo.controllers import DEMO_STREAMS


def test_stream_numbers_are_distinct():
    numbers = list(rng.STREAMS.values()) + list(DEMO_STREAMS.values())
    assert len(numbers) == len(set(numbers))


def test_uniform_passes_kolmogorov_smirnov():
    # scipy.stats.kstest against U(0, 1), on consecutive addresses (the hardest case for a
    # counter-based generator)
    u = rng.uniform(3, np.repeat(np.arange(200), 500), np.tile(np.arange(500), 200), stream="goal")
    assert stats.kstest(u, "uniform").pvalue > 0.01
    # neighbouring streams are not correlated
    v = rng.uniform(3, np.repeat(np.arange(200), 500), np.tile(np.arange(500), 200), stream="strategy")
    assert abs(stats.pearsonr(u, v).statistic) < 0.02


@settings(max_examples=50, deadline=None)
@given(seed=st.integers(0, 2**63 - 1), n=st.integers(1, 200), cut=st.integers(0, 200),
       low=st.integers(-5, 5), span=st.integers(1, 1000))
def test_draws_depend_only_on_their_address(seed, n, cut, low, span):
    ep, step = np.arange(n) // 7, np.arange(n) % 7
    whole = rng.integers(seed, low, low + span, ep, step, stream="goal")
    cut = min(cut, n)
    parts = np.concatenate([rng.integers(seed, low, low + span, ep[:cut], step[:cut], stream="goal"),
                            rng.integers(seed, low, low + span, ep[cut:], step[cut:], stream="goal")])
    np.testing.assert_array_equal(whole, parts)
    assert whole.min() >= low and whole.max() < low + span
