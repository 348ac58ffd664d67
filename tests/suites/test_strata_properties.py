"""Suite stratification: every row in exactly one bucket and one cell, and a choice that is a
pure function of the seed and each row's address (property tests, hypothesis)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.errors import GoalkitError
from goalkit.suites import strata

edges_st = st.lists(st.integers(1, 200), min_size=1, max_size=5, unique=True).map(sorted)
horizon_st = st.lists(st.one_of(st.just(-1), st.integers(1, 400)), min_size=1, max_size=200)


@settings(max_examples=100, deadline=None)
@given(edges_st, horizon_st)
def test_every_horizon_in_exactly_one_bucket_whose_bounds_hold(edges, horizons):
    h = np.array(horizons)
    b = strata.horizon_bucket(h, edges)
    names = strata.bucket_names(edges)
    assert len(names) == len(edges) + 2 and b.min() >= 0 and b.max() < len(names)
    lows = [1] + [e + 1 for e in edges]
    highs = list(edges) + [np.inf]
    for k in range(len(edges) + 1):  # bucket k holds exactly lows[k] <= h <= highs[k]
        np.testing.assert_array_equal(b == k, (h >= lows[k]) & (h <= highs[k]))
    np.testing.assert_array_equal(b == len(edges) + 1, h == -1)


@settings(max_examples=100, deadline=None)
@given(st.data())
def test_cells_partition_the_rows_and_the_choice_is_deterministic(data):
    n = data.draw(st.integers(1, 150))
    route = np.array(data.draw(st.lists(st.integers(0, 2), min_size=n, max_size=n)))
    bucket = np.array(data.draw(st.lists(st.integers(0, 4), min_size=n, max_size=n)))
    prox = np.array(data.draw(st.lists(st.integers(0, 1), min_size=n, max_size=n)))
    per_cell = data.draw(st.integers(1, 20))
    seed = data.draw(st.integers(0, 2**32))
    ep = np.arange(n) // 3
    step = np.arange(n) % 3
    slot = np.zeros(n, np.int64)
    cell = strata.cell_of(route, bucket, prox, 5)
    # the cell id determines (route, bucket, proximity) and back: one cell per row
    assert np.unique(cell).size == np.unique(np.stack([route, bucket, prox], 1), axis=0).shape[0]
    kept = strata.pick_per_cell(cell, ep, step, slot, per_cell=per_cell, seed=seed)
    for c in np.unique(cell):
        assert (cell[kept] == c).sum() == min(per_cell, (cell == c).sum())
    np.testing.assert_array_equal(kept, strata.pick_per_cell(cell, ep, step, slot, per_cell=per_cell, seed=seed))
    perm = np.random.default_rng(seed % 1000).permutation(n)  # row order does not matter
    kept_p = strata.pick_per_cell(cell[perm], ep[perm], step[perm], slot[perm], per_cell=per_cell, seed=seed)
    assert set(zip(ep[perm][kept_p], step[perm][kept_p])) == set(zip(ep[kept], step[kept]))


def test_near_far_cut_is_inclusive_and_bad_settings_are_refused():
    np.testing.assert_array_equal(strata.proximity([0.0, 0.5, 0.50001, np.nan], 0.5), [0, 0, 1, 1])
    with pytest.raises(GoalkitError, match="strictly increasing"):
        strata.check_edges([4, 4])
    with pytest.raises(GoalkitError, match="whole numbers >= 1"):
        strata.check_edges([0.5])
    with pytest.raises(GoalkitError, match="horizons >= 1 or -1"):
        strata.horizon_bucket([0], [4])
    assert strata.bucket_names([1, 4]) == ["1", "2-4", ">=5", "unreachable"]
