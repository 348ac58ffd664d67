"""Boundary inference from episode ids, done flags and offsets (Hypothesis properties)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.errors import LogError
from goalkit.logs.boundaries import (counts_from_done, counts_from_done_blocks, counts_from_id_blocks,
                                     counts_from_ids, counts_from_offsets)
from goalkit.logs.flat import ranges_index

lengths_st = st.lists(st.integers(min_value=1, max_value=30), min_size=1, max_size=40)
SETTINGS = settings(max_examples=150, deadline=None)


@SETTINGS
@given(lengths=lengths_st, data=st.data())
def test_ids_give_the_true_lengths(lengths, data):
    # any distinct ids, in any order (not necessarily increasing or consecutive)
    ids = data.draw(st.lists(st.integers(-10**6, 10**6), min_size=len(lengths),
                             max_size=len(lengths), unique=True))
    arr = np.repeat(np.array(ids, dtype=np.int64), lengths)
    counts = counts_from_ids(arr)
    assert counts.tolist() == lengths
    np.testing.assert_array_equal(np.concatenate([[0], np.cumsum(counts)]),
                                  np.concatenate([[0], np.cumsum(lengths)]))


@SETTINGS
@given(lengths=lengths_st, as_int=st.booleans())
def test_done_flags_give_the_true_lengths(lengths, as_int):
    done = np.zeros(sum(lengths), dtype=bool)
    done[np.cumsum(lengths) - 1] = True
    counts, ended = counts_from_done(done.astype(np.uint8) if as_int else done)
    assert ended and counts.tolist() == lengths


@SETTINGS
@given(lengths=lengths_st, tail=st.integers(1, 10))
def test_unended_last_episode_is_reported(lengths, tail):
    done = np.zeros(sum(lengths) + tail, dtype=bool)
    done[np.cumsum(lengths) - 1] = True
    counts, ended = counts_from_done(done)
    assert not ended and counts.tolist() == lengths + [tail]


@SETTINGS
@given(lengths=lengths_st, with_end=st.booleans())
def test_offsets_and_starts_give_the_true_lengths(lengths, with_end):
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    given_arr = offsets if with_end else offsets[:-1]
    assert counts_from_offsets(given_arr, int(offsets[-1])).tolist() == lengths


@SETTINGS
@given(lengths=st.lists(st.integers(0, 6), min_size=1, max_size=20), data=st.data())
def test_ranges_index_is_concatenated_aranges(lengths, data):
    starts = data.draw(st.lists(st.integers(0, 50), min_size=len(lengths), max_size=len(lengths)))
    expected = [i for s, n in zip(starts, lengths) for i in range(s, s + n)]
    assert ranges_index(np.array(starts), np.array(lengths)).tolist() == expected


def test_id_that_comes_back_is_refused():
    with pytest.raises(LogError, match="episode id 3 comes back at row 4 after other episodes"):
        counts_from_ids(np.array([3, 3, 5, 5, 3]), file="f.h5", key="episode")


@pytest.mark.parametrize("offsets, message", [
    ([0, 5, 3, 8], "expected non-decreasing offsets, entry 2 is 3 after 5"),
    ([1, 4, 8], "expected offsets to start at 0, got 1"),
    ([0, 4, 9], "expected offsets at most 8"),
    ([0.0, 4.0], "expected integer offsets"),
])
def test_bad_offsets(offsets, message):
    with pytest.raises(LogError) as info:
        counts_from_offsets(np.array(offsets), 8, file="f.h5", key="starts")
    assert message in str(info.value) and str(info.value).startswith("f.h5: key starts: ")


def test_equal_offsets_make_an_empty_episode():
    assert counts_from_offsets(np.array([0, 3, 3, 8]), 8).tolist() == [3, 0, 5]


def test_bad_done_values():
    with pytest.raises(LogError, match="expected a bool or 0/1 done flag, got 2 at row 1"):
        counts_from_done(np.array([0, 2, 1]))
    with pytest.raises(LogError, match="expected a 1-D done-flag array"):
        counts_from_done(np.zeros((3, 2), dtype=bool))


def split_blocks(arr, cuts):
    edges = sorted({0, len(arr), *[c % (len(arr) + 1) for c in cuts]})
    return [arr[a:b] for a, b in zip(edges[:-1], edges[1:])]


@SETTINGS
@given(lengths=lengths_st, cuts=st.lists(st.integers(0, 10**6), max_size=6))
def test_block_by_block_equals_whole_array(lengths, cuts):
    ids = np.repeat(np.arange(len(lengths)) * 2 + 1, lengths)
    assert counts_from_id_blocks(split_blocks(ids, cuts)).tolist() == lengths
    done = np.zeros(sum(lengths), dtype=bool)
    done[np.cumsum(lengths) - 1] = True
    counts, ended = counts_from_done_blocks(split_blocks(done, cuts))
    assert ended and counts.tolist() == lengths


def test_id_coming_back_across_blocks():
    with pytest.raises(LogError, match="episode id 3 comes back at row 5"):
        counts_from_id_blocks([np.array([3, 3]), np.array([4, 4, 4]), np.array([3])])


@settings(max_examples=40, deadline=None)
@given(lengths=st.lists(st.integers(min_value=1, max_value=12), min_size=1, max_size=15),
       boundary=st.sampled_from(["episode_id", "done", "offsets", "starts"]),
       convention=st.sampled_from(["T+1", "pairs"]),
       aligned=st.sampled_from(["step", "state"]))
def test_flat_reader_offsets_equal_the_truth(lengths, boundary, convention, aligned):
    """End to end: a flat .npz of random episode lengths is read with the true offsets."""
    import tempfile

    from goalkit.logs import open_logs
    from logs_testdata import make_episodes, write_flat

    if boundary == "starts" or convention == "pairs":
        aligned = "step"                         # starts always count action rows
    eps = make_episodes(lengths, seed=len(lengths))
    with tempfile.TemporaryDirectory() as tmp:
        path = f"{tmp}/f.npz"
        table = write_flat(path, eps, convention, boundary, aligned=aligned, fmt="npz")
        src = open_logs(path, table)
        es = src.read(0, len(lengths))
    np.testing.assert_array_equal(es.offsets, np.concatenate([[0], np.cumsum(lengths)]))
    np.testing.assert_array_equal(es.state_offsets()[1:] - es.state_offsets()[:-1], np.array(lengths) + 1)


def test_boundaries_from_ids_flags_and_offsets_together(tmp_path):
    """Any combination of ids, several done flags and offsets: an episode ends where any of them
    ends one; a lone flag leaves the last episode open; all must count the same rows."""
    import h5py

    from goalkit.logs import open_logs

    n = 12
    with h5py.File(tmp_path / "c.h5", "w") as f:
        f["obs"] = np.arange(2 * n, dtype=np.float64).reshape(n, 2)
        f["next"] = f["obs"][:] + 0.0
        f["act"] = np.zeros((n, 1))
        f["ids"] = np.array([0, 0, 0, 0, 1, 1, 1, 1, 1, 1, 1, 1])       # one change, after row 3
        f["a"] = np.eye(1, n, 6, dtype=bool)[0]                        # ends after row 6
        f["b"] = np.eye(1, n, 9, dtype=np.uint8)[0]                    # ends after row 9
        f["starts"] = np.array([0, 2])                                 # a start at row 2
    base = {"shape": "flat", "keys": {"observation": "obs", "action": "act"}}

    def lengths(**b):
        return open_logs(tmp_path / "c.h5", dict(base, boundaries=b), skip_bad_episodes=True).lengths.tolist()

    # T observations per action: each episode drops its last row
    assert lengths(episode_id="ids", done=["a", "b"]) == [3, 2, 2, 1]             # rows 4 | 3 | 3 | 2
    assert lengths(episode_id="ids", done="a", offsets="starts") == [1, 1, 2, 4]    # rows 2 | 2 | 3 | 5
    with pytest.raises(LogError, match=r"key a\+b: episode 2: step 1: the done flags never end the last "
                                       r"episode: its last 2 rows have no true value"):
        open_logs(tmp_path / "c.h5", dict(base, boundaries={"done": ["a", "b"]}))
