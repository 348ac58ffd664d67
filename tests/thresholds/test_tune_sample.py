"""The episode sample behind ``goalkit tune --max-transitions`` (property tests).

Rules pinned: whole episodes only; the budget holds unless one episode alone exceeds it;
the chosen episodes are a prefix of the order of their ``goalkit.rng`` keys (addressed by
seed and episode id, so the choice does not depend on chunking); reading the sample gives
exactly the log's own rows of those episodes.
"""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit import rng
from goalkit.logs.episodes import EpisodeSet
from goalkit.logs.memory import MemorySource
from goalkit.thresholds.sample import SAMPLE_STEP, SampledSource, sample_episodes

lengths_st = st.lists(st.integers(1, 40), min_size=1, max_size=30)


@settings(max_examples=200, deadline=None)
@given(lengths=lengths_st, budget=st.integers(1, 600), seed=st.integers(0, 2**32), shift=st.integers(0, 50))
def test_sample_is_a_key_order_prefix_within_budget(lengths, budget, seed, shift):
    lengths = np.array(lengths)
    ids = np.arange(lengths.size) * 2 + shift          # ids need not be positions
    pos = sample_episodes(ids, lengths, budget, seed)
    assert np.all(np.diff(pos) > 0) and pos.size >= 1
    if lengths.sum() <= budget:
        assert pos.tolist() == list(range(lengths.size))
        return
    key = rng.uniform(seed, ids, SAMPLE_STEP, slot=0, stream="subsample")
    order = np.argsort(key, kind="stable")
    k = pos.size
    assert sorted(order[:k].tolist()) == pos.tolist()   # a prefix of the key order
    total = lengths[pos].sum()
    assert total <= budget or k == 1
    assert k == lengths.size or total + lengths[order[k]] > budget   # greedy: the next does not fit
    assert sample_episodes(ids, lengths, budget, seed).tolist() == pos.tolist()


def _episodes(lengths, seed):
    r = np.random.default_rng(seed)
    n, e = int(sum(lengths)), len(lengths)
    offsets = np.r_[0, np.cumsum(lengths)].astype(np.int64)
    return EpisodeSet(observations=r.normal(size=(n + e, 3)), actions=r.normal(size=(n, 2)),
                      offsets=offsets, episode_ids=np.arange(e, dtype=np.int64),
                      success=r.random(n) < 0.2, task_goals=r.normal(size=(n, 3)),
                      rewards=r.normal(size=n).astype(np.float32))


@settings(max_examples=100, deadline=None)
@given(lengths=lengths_st, data=st.data())
def test_sampled_source_reads_the_logs_own_rows(lengths, data):
    ep = _episodes(lengths, seed=len(lengths))
    src = MemorySource(ep)
    pos = np.array(sorted(data.draw(st.sets(st.integers(0, len(lengths) - 1), min_size=1))))
    sub = SampledSource(src, pos)
    a = data.draw(st.integers(0, pos.size - 1))
    b = data.draw(st.integers(a + 1, pos.size))
    got = sub.read(a, b)
    want = [src.read(int(p), int(p) + 1) for p in pos[a:b]]
    assert got.episode_ids.tolist() == pos[a:b].tolist()
    assert got.lengths.tolist() == [w.num_transitions for w in want]
    for name in ("observations", "actions", "success", "task_goals", "rewards"):
        np.testing.assert_array_equal(getattr(got, name), np.concatenate([getattr(w, name) for w in want]))
    assert sub.lengths.tolist() == np.asarray(lengths)[pos].tolist()
