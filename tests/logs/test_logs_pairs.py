"""Observation / next-observation pairs: next_observation[t] must be observation[t+1]."""

from __future__ import annotations

import h5py
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.errors import LogError
from goalkit.logs import checks, open_logs
from logs_testdata import assert_matches, make_episodes, stored, write_flat, write_grouped, write_per_file

LENGTHS = [3, 4, 5, 2]
BAD_EPISODE, BAD_STEP = 2, 1   # next_observation[1] of episode 2 is not observation[2]


def break_pair(eps):
    """The stored arrays of every episode, with one next observation moved off its successor."""
    per = [stored(e, "pairs") for e in eps]
    per[BAD_EPISODE]["next_obs"] = per[BAD_EPISODE]["next_obs"].copy()
    per[BAD_EPISODE]["next_obs"][BAD_STEP] += np.float32(0.25)
    return per


def write_grouped_broken(path, eps):
    table = write_grouped(path, eps, "pairs")
    per = break_pair(eps)
    with h5py.File(path, "a") as f:
        del f[f"runs/ep{BAD_EPISODE}/next_obs"]
        f[f"runs/ep{BAD_EPISODE}/next_obs"] = per[BAD_EPISODE]["next_obs"]
    return table, f"runs/ep{BAD_EPISODE}/next_obs"


def write_flat_broken(path, eps, fmt):
    per = break_pair(eps)
    nxt = np.concatenate([p["next_obs"] for p in per])
    return write_flat(path, eps, "pairs", boundary="offsets", fmt=fmt, replace={"next_obs": nxt}), "next_obs"


def write_per_file_broken(path, eps):
    table = write_per_file(path, eps, "pairs")
    per = break_pair(eps)
    s = per[BAD_EPISODE]
    s["task"] = np.int64(eps[BAD_EPISODE]["task"])
    np.savez(path / f"ep{BAD_EPISODE}.npz", **s)
    return table, "next_obs"


SHAPES = {
    "grouped": lambda d, eps: (d / "g.h5", *write_grouped_broken(d / "g.h5", eps)),
    "flat hdf5": lambda d, eps: (d / "f.h5", *write_flat_broken(d / "f.h5", eps, "h5")),
    "flat npz": lambda d, eps: (d / "f.npz", *write_flat_broken(d / "f.npz", eps, "npz")),
    "per-file": lambda d, eps: (d / "eps", *write_per_file_broken(d / "eps", eps)),
}


@pytest.mark.parametrize("shape", sorted(SHAPES))
def test_a_broken_pair_names_file_key_episode_and_step(tmp_path, shape):
    eps = make_episodes(LENGTHS, seed=5)
    path, table, key = SHAPES[shape](tmp_path, eps)
    with pytest.raises(LogError) as err:
        src = open_logs(path, table)
        src.read(0, src.num_episodes)
    msg = str(err.value)
    assert "\n" not in msg
    assert err.value.episode == BAD_EPISODE and err.value.step == BAD_STEP
    assert key in msg
    assert f"next_observation at step {BAD_STEP} differs from observation at step {BAD_STEP + 1}" in msg
    assert "largest difference 0.25" in msg


@pytest.mark.parametrize("shape", sorted(SHAPES))
def test_skipping_drops_only_the_broken_episode(tmp_path, shape):
    eps = make_episodes(LENGTHS, seed=5)
    path, table, _ = SHAPES[shape](tmp_path, eps)
    src = open_logs(path, table, skip_bad_episodes=True)
    assert [e for e, _ in src.skipped] == [BAD_EPISODE]
    kept = [i for i in range(len(LENGTHS)) if i != BAD_EPISODE]
    assert_matches(src.read(0, src.num_episodes), eps, kept)


def test_pairs_that_agree_read_back_exactly(tmp_path):
    eps = make_episodes(LENGTHS, seed=6)
    table = write_flat(tmp_path / "ok.h5", eps, "pairs", boundary="offsets")
    src = open_logs(tmp_path / "ok.h5", table)
    assert_matches(src.read(0, src.num_episodes), eps, list(range(len(LENGTHS))))


def test_rounding_within_the_tolerance_is_accepted():
    obs = np.array([[1.0, 2.0], [1.5, 2.5], [2.0, 3.0]])
    nxt = obs[[1, 2, 2]] * (1 + 1e-7)  # the last row is s_T (compared with nothing)
    assert checks.first_discontinuity(obs, nxt, np.array([3])) is None
    nxt[0, 1] += 1e-3
    pos, step, diff = checks.first_discontinuity(obs, nxt, np.array([3]))
    assert (pos, step) == (0, 0) and diff == pytest.approx(1e-3, rel=1e-3)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.integers(1, 6), min_size=1, max_size=8), st.data())
def test_the_first_broken_pair_is_found_and_episode_ends_are_not_compared(lengths, data):
    # next rows are the following observation inside each episode and unrelated across episode
    # ends; the check must stay silent until a pair inside an episode is broken, then report it
    lengths = np.asarray(lengths)
    n = int(lengths.sum())
    rs = np.random.default_rng(int(data.draw(st.integers(0, 2**31))))
    states = [rs.normal(size=(T + 1, 2)) for T in lengths]
    obs = np.concatenate([s[:-1] for s in states])
    nxt = np.concatenate([s[1:] for s in states])
    assert checks.first_discontinuity(obs, nxt, lengths) is None
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]])
    inner = [r for r in range(n) if r + 1 < n and (r + 1) not in set(starts.tolist())]
    if not inner:
        return
    broken = sorted(set(data.draw(st.lists(st.sampled_from(inner), min_size=1, max_size=3))))
    nxt[broken, 0] += 1.0
    pos, step, diff = checks.first_discontinuity(obs, nxt, lengths)
    r = broken[0]
    want_pos = int(np.searchsorted(starts, r, side="right") - 1)
    assert (pos, step) == (want_pos, r - int(starts[want_pos]))
    assert diff == pytest.approx(1.0)
