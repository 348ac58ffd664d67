"""The shared planning frontier (goalkit/logs/frontier.py).

Two planners claim batches of a run of episodes, one from the start upwards and one from the
end downwards; the rule under test is the one the caller relies on: together they cover every
episode, each claims whole batches in its own direction, and they overlap by at most one batch
(only when they claim at the same moment). Reference: the run itself (0 .. total - 1); the
schedules are drawn by hypothesis and, for real concurrency, by two threads switching as often
as the interpreter allows.
"""

from __future__ import annotations

import os
import sys
import threading

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.logs import frontier as frontier_mod
from goalkit.logs.frontier import Frontier, plan_downwards, plan_upwards


def pair(monkeypatch, total: int, batch: int):
    monkeypatch.setattr(frontier_mod, "BATCH", batch)
    low = Frontier.create(total)
    assert low is not None
    return low, Frontier.attach(low.path)


@settings(max_examples=200, deadline=None)
@given(total=st.integers(0, 400), batch=st.integers(1, 40), turns=st.lists(st.booleans(), max_size=900))
def test_any_order_of_turns_covers_every_episode_once(total, batch, turns):
    with pytest.MonkeyPatch.context() as mp:
        low, high = pair(mp, total, batch)
    try:
        up, down = [], []
        at_low, at_high, low_done, high_done = 0, total, False, False
        for turn in turns + [True] * (total + 2) + [False] * (total + 2):
            if turn and not low_done:
                got = low.claim_low(at_low)
                if got is None:
                    low_done = True
                else:
                    up.append(got)
                    at_low = got[1]
            elif not turn and not high_done:
                got = high.claim_high(at_high)
                if got is None:
                    high_done = True
                else:
                    down.append(got)
                    at_high = got[0]
        assert low_done and high_done
        # whole batches, each planner in its own direction, adjacent, no gap and no overlap
        assert all(0 < b - a <= batch for a, b in up + down)
        assert [a for a, _ in up] == [0, *(b for _, b in up)][:len(up)]
        assert [b for _, b in down] == [total, *(a for a, _ in down)][:len(down)]
        assert at_low == at_high                       # they met
        edges = [0, *(b for _, b in up), *(a for a, _ in reversed(down)), total]
        assert edges == sorted(edges)
        assert sum(b - a for a, b in up + down) == total   # every episode, once
    finally:
        high.close()
        low.close()


def test_two_threads_racing_leave_no_gap_and_overlap_by_at_most_a_batch(monkeypatch):
    # the claims are read-then-publish: switching threads as often as possible makes them read
    # each other's claim just before it moves; the union must still be everything
    total, batch = 60_000, 2
    old = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)
    try:
        for _ in range(3):
            low, high = pair(monkeypatch, total, batch)
            up, down = [], []
            t = threading.Thread(target=lambda: down.append(plan_downwards(high, total, lambda a, b: None)))
            t.start()
            stop = plan_upwards(low, 0, lambda a, b: None)
            t.join()
            first = down[0]
            assert first <= stop                       # no gap between the two parts
            assert stop - first <= batch               # at most one batch planned twice
            assert low.low() == stop and high.high() == first
            high.close()
            low.close()
    finally:
        sys.setswitchinterval(old)


def test_each_planner_sees_the_other_and_stops_at_its_claim(monkeypatch):
    low, high = pair(monkeypatch, 10, 3)
    try:
        assert high.claim_high(10) == (7, 10) and low.high() == 7
        assert low.claim_low(0) == (0, 3) and high.low() == 3
        assert high.claim_high(7) == (4, 7)
        assert low.claim_low(3) == (3, 4)              # up to the helper's claim, not a whole batch
        assert low.claim_low(4) is None and high.claim_high(4) is None
    finally:
        high.close()
        low.close()


def test_the_shared_file_is_private_and_gone_after_close(monkeypatch):
    low, high = pair(monkeypatch, 5, 2)
    path = low.path
    st_ = os.stat(path)
    assert st_.st_size == 24 and st_.st_mode & 0o077 == 0     # mkstemp: this user only
    assert np.frombuffer(open(path, "rb").read(), dtype=np.int64).tolist() == [0, 5, 2]
    high.close()
    assert os.path.exists(path)                          # the helper never deletes it
    low.close()
    assert not os.path.exists(path)
    low.close()                                          # twice is harmless


def test_the_name_goes_once_the_helper_has_claimed(monkeypatch):
    # both processes have the file mapped once the helper claimed a batch: the caller deletes the
    # name then, so a build killed later leaves nothing in the shared-memory folder
    low, high = pair(monkeypatch, 10, 3)
    try:
        assert low.claim_low(0) == (0, 3) and os.path.exists(low.path)    # the helper has not claimed
        assert high.claim_high(10) == (7, 10)
        assert low.claim_low(3) == (3, 6) and not os.path.exists(low.path)
        assert high.claim_high(7) == (6, 7) and low.claim_low(6) is None  # still shared after
    finally:
        high.close()
        low.close()


def test_attach_refuses_a_link_and_a_file_that_is_not_a_frontier(tmp_path, monkeypatch):
    low, _ = pair(monkeypatch, 5, 2)
    try:
        link = tmp_path / "planted"
        link.symlink_to(low.path)
        with pytest.raises(OSError):
            Frontier.attach(str(link))
        other = tmp_path / "other"
        other.write_bytes(b"\0" * 16)
        with pytest.raises(ValueError):
            Frontier.attach(str(other))
        zero = tmp_path / "zero"
        zero.write_bytes(np.asarray([0, 5, 0], dtype=np.int64).tobytes())   # batch 0
        with pytest.raises(ValueError):
            Frontier.attach(str(zero))
        assert zero.exists()                             # refused, not deleted
    finally:
        _.close()
        low.close()


def test_no_shared_file_means_no_frontier(monkeypatch, tmp_path):
    monkeypatch.setattr(frontier_mod, "_folder", lambda: str(tmp_path / "missing"))
    assert Frontier.create(10) is None
