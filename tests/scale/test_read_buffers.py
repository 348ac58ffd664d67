"""Shard files read back into reused buffers (shardfiles.ReadBuffers): a buffer is handed out
again only once no array refers to it, so the rows of a shard still waiting to be written are
never overwritten by the next shard's bytes.

Invented shard rows (unit tests); the property test draws any order of reads and releases.
"""

from dataclasses import replace
from types import SimpleNamespace

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.pipeline.chunk import ChunkRows
from goalkit.pipeline.shardfiles import ReadBuffers, plan_shards, read_shard, write_shard


def _write(folder, index: int, seed: int, transitions: int):
    """A shard file of ``transitions`` transitions (two goals each) with values drawn from ``seed``."""
    lengths = np.array([transitions])
    spec = plan_shards(SimpleNamespace(lengths=lengths, episode_ids=np.array([index])), 10 ** 6)[0]
    spec = replace(spec, index=index)
    g = np.random.default_rng(seed)
    rows = 2 * transitions
    cols = {"source_episode": np.full(rows, index, np.int64), "goal": g.normal(size=(rows, 3))}
    order = ["source_episode", "goal"]
    write_shard(folder, spec, "k", ChunkRows({"train": cols}, {"train": np.arange(rows, dtype=np.int64)}), order)
    return spec, order, cols


def test_rows_still_held_are_not_overwritten_by_the_next_shard(tmp_path):
    buffers = ReadBuffers(keep=2)
    a_spec, order, a_cols = _write(tmp_path, 0, seed=1, transitions=3000)
    b_spec, _, b_cols = _write(tmp_path, 1, seed=2, transitions=3000)
    a = read_shard(tmp_path, a_spec, "k", order, buffers=buffers)
    b = read_shard(tmp_path, b_spec, "k", order, buffers=buffers)       # while a's rows are held
    np.testing.assert_array_equal(a.columns["train"]["goal"], a_cols["goal"])
    np.testing.assert_array_equal(b.columns["train"]["goal"], b_cols["goal"])
    assert not np.shares_memory(a.columns["train"]["goal"], b.columns["train"]["goal"])
    # once a's rows are let go, the next shard is read into a's buffer (no new one)
    base_id = id(a.columns["train"]["goal"].base)
    del a
    c = read_shard(tmp_path, a_spec, "k", order, buffers=buffers)
    assert id(c.columns["train"]["goal"].base) == base_id and len(buffers.buffers) == 2
    np.testing.assert_array_equal(c.columns["train"]["goal"], a_cols["goal"])
    np.testing.assert_array_equal(b.columns["train"]["goal"], b_cols["goal"])   # b untouched


def test_a_view_of_a_view_keeps_the_buffer_taken():
    buffers = ReadBuffers(keep=2)
    first = buffers.take(100)
    view = np.frombuffer(first, np.float64, 4, 8)[1:3]       # as the shard arrays and their slices
    del first
    assert not np.shares_memory(buffers.take(100), view)
    del view
    assert len(buffers.buffers) == 2


def test_the_smallest_free_buffer_that_fits_is_used_and_a_full_pool_keeps_no_more():
    buffers = ReadBuffers(keep=2)
    big, small = buffers.take(5 << 20), buffers.take(1 << 20)
    big_id, small_id = id(big), id(small)
    del big, small
    again = buffers.take(100)
    assert id(again) == small_id                              # the smaller of the two that fit
    held = [again, buffers.take(100)]                         # both kept buffers now in use
    extra = buffers.take(100)
    assert id(extra) not in {big_id, small_id} and len(buffers.buffers) == 2   # not kept
    del held, extra, again
    # a larger request than any kept buffer: a kept idle one (the smaller) makes room
    bigger = buffers.take(9 << 20)
    assert bigger.size >= 9 << 20 and len(buffers.buffers) == 2
    assert {id(b) for b in buffers.buffers} == {big_id, id(bigger)}


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.booleans(), st.integers(1, 3 << 20), st.integers(0, 7)), min_size=1, max_size=40),
       st.integers(1, 4))
def test_a_buffer_in_use_is_never_handed_out_again(steps, keep):
    # Each step either takes a buffer (and keeps an array view of it, as a shard's rows do) or
    # lets go of one held view. No two held views may share memory; sizes fit; the pool keeps at
    # most `keep` buffers.
    buffers = ReadBuffers(keep=keep)
    held = []
    for take, size, which in steps:
        if take or not held:
            buf = buffers.take(size)
            assert buf.size >= size and buf.dtype == np.uint8
            view = np.frombuffer(buf, np.uint8, size)
            del buf
            assert not any(np.shares_memory(view, other) for other in held)
            held.append(view)
        else:
            held.pop(which % len(held))
        assert len(buffers.buffers) <= keep
