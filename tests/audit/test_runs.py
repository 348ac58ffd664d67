"""The audit's and verify's per-run shortcuts give what the row-by-row computation gives.

verify and the audit look episode ids up once per run of equal ids (``_Runs``), compute phi once
over the states of the episodes a block touches (``_Logs._phi_at``), compare whole columns
before reducing per row and test strategy-code membership with a table. Each must return
exactly what numpy's plain per-row form returns, for any input (rows in any order, repeated
ids, NaN values), or verify's report would change: property tests against numpy itself.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.audit.rowrules import among
from goalkit.audit.run import _differing_rows, _Logs
from goalkit.audit.run import _Runs as AuditRuns
from goalkit.demo import make_demo
from goalkit.goals.goalmap import IndexGoalMap
from goalkit.logs import open_logs
from goalkit.write.verify import _rows_differ
from goalkit.write.verify import _Runs as VerifyRuns

ids = st.lists(st.integers(-3, 12), max_size=60).map(lambda v: np.asarray(v, dtype=np.int64))


@given(values=ids)
def test_a_function_of_each_value_spread_over_runs_is_the_function_of_every_value(values):
    table = np.array([-1, 0, 2, 3, 7, 11], dtype=np.int64)
    for runs in (AuditRuns(values), VerifyRuns(values)):
        assert runs.lengths.sum() == len(values)
        for f in (lambda v: np.searchsorted(table, v), lambda v: np.isin(v, table), lambda v: v * 3 + 1):
            got = runs.spread(f(runs.values))
            want = f(values)
            assert got.dtype == want.dtype
            np.testing.assert_array_equal(got, want)


@given(a=st.lists(st.lists(st.sampled_from([0.0, -0.0, 1.5, np.nan, np.inf]), min_size=3, max_size=3),
                  max_size=20), flips=st.lists(st.integers(0, 59), max_size=4))
def test_row_differences_are_numpys(a, flips):
    a = np.asarray(a, dtype=np.float64).reshape(-1, 3)
    b = a.copy().reshape(-1)
    for i in flips:
        if i < b.size:
            b[i] = 2.5
    b = b.reshape(a.shape)
    want = np.any(a != b, axis=1)    # NaN differs from NaN, -0.0 equals 0.0, as numpy says
    np.testing.assert_array_equal(_rows_differ(a, b), want)
    np.testing.assert_array_equal(_differing_rows(a != b), want)


@given(codes=st.lists(st.integers(0, 255), max_size=50), wanted=st.sets(st.integers(0, 8), max_size=5))
def test_code_membership_is_numpys_isin(codes, wanted):
    for dtype in (np.uint8, np.int64):
        x = np.asarray(codes, dtype=dtype)
        np.testing.assert_array_equal(among(x, sorted(wanted)), np.isin(x, sorted(wanted)))
    big = np.asarray(codes + [300, -1], dtype=np.int64)   # outside the byte range: numpy's isin itself
    np.testing.assert_array_equal(among(big, sorted(wanted)), np.isin(big, sorted(wanted)))


@pytest.fixture(scope="module")
def chunk(tmp_path_factory):
    d = tmp_path_factory.mktemp("runs")
    info = make_demo(d, episodes=6, seed=4)
    return open_logs(info["logs"], info["layout"]).read(0, 6)


@given(data=st.data())
@settings(max_examples=40, deadline=None)
def test_phi_over_the_touched_episodes_is_phi_per_row(chunk, data):
    """phi computed once over the states of the episodes touched, then picked per row, equals
    the goal map called with the rows themselves (the audit's achieved goals)."""
    logs = SimpleNamespace(goal_map=IndexGoalMap(indices=(0, 2, 4)), goal_dtype=np.dtype("float32"))
    local = np.asarray(data.draw(st.lists(st.integers(0, chunk.num_episodes - 1), min_size=1, max_size=40)))
    steps = np.asarray([data.draw(st.integers(0, int(chunk.lengths[e]))) for e in local])
    rows = chunk.state_row(local, steps)
    want = np.asarray(logs.goal_map(chunk, rows)).astype(logs.goal_dtype)
    got = _Logs._phi_at(logs, chunk, local, rows)
    assert got.dtype == want.dtype
    np.testing.assert_array_equal(got, want)
