"""The one-process build's reader process (goalkit/pipeline/readproc.py).

Reference: the same build with the chunks read in the build's own process (the reader may only
change the timing: the file's SHA-256 and every error must be the same).
"""

from __future__ import annotations

import hashlib

import h5py
import numpy as np
import pytest

from goalkit.demo import make_demo
from goalkit.errors import LogError
from goalkit.logs import open_logs
from goalkit.pipeline import readproc
from goalkit.pipeline.build import build
from goalkit.pipeline.plan import make_plan
from goalkit.pipeline.recipe import load_recipe
from goalkit.pipeline.shardfiles import plan_shards


def sha256(path) -> str:
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


@pytest.fixture
def reader_on(monkeypatch):
    """A reader process for small builds too; records what it read and what fell back."""
    monkeypatch.setattr(readproc, "MIN_TRANSITIONS", 1)
    monkeypatch.setattr(readproc, "cpus", lambda: 2)
    log = {"received": 0, "fallback": 0}
    receive = readproc.ChunkReader._receive

    def counted_receive(self):
        found = receive(self)
        log["received" if found is not None else "fallback"] += 1
        return found

    monkeypatch.setattr(readproc.ChunkReader, "_receive", counted_receive)
    return log


def demo(tmp_path, episodes=40):
    info = make_demo(tmp_path / "demo", episodes=episodes, seed=3)
    return info, load_recipe(info["recipe"])


def test_reader_process_gives_the_same_bytes(tmp_path, reader_on, monkeypatch):
    info, recipe = demo(tmp_path)
    a = build(recipe.with_overrides(out=tmp_path / "a.h5"), max_rows_per_chunk=500, card=False)
    assert reader_on["received"] >= 4 and reader_on["fallback"] == 0
    monkeypatch.setenv(readproc.SWITCH, "0")
    b = build(recipe.with_overrides(out=tmp_path / "b.h5"), max_rows_per_chunk=500, card=False)
    assert sha256(a.path) == sha256(b.path)


def test_a_bad_value_is_reported_as_without_the_reader(tmp_path, reader_on, monkeypatch):
    info, recipe = demo(tmp_path)
    with h5py.File(info["logs"], "r+") as f:
        d = f["bench/ep_00031/head"]
        x = d[:]
        x[3, 1] = np.inf
        d[...] = x
    with pytest.raises(LogError) as err:
        build(recipe.with_overrides(out=tmp_path / "a.h5"), max_rows_per_chunk=500, card=False)
    assert reader_on["fallback"] >= 1                   # the reader's chunk failed; read here
    monkeypatch.setenv(readproc.SWITCH, "0")
    with pytest.raises(LogError) as ref:
        build(recipe.with_overrides(out=tmp_path / "b.h5"), max_rows_per_chunk=500, card=False)
    assert str(err.value) == str(ref.value) and err.value.episode == 31 and err.value.step == 3
    assert not (tmp_path / "a.h5").exists()


def test_a_reader_that_dies_leaves_the_reading_to_the_build(tmp_path, reader_on, monkeypatch):
    info, recipe = demo(tmp_path)
    real = readproc.ChunkReader._start

    def start_then_die(self):
        real(self)
        self.proc.kill()
        self.proc.wait()

    monkeypatch.setattr(readproc.ChunkReader, "_start", start_then_die)
    a = build(recipe.with_overrides(out=tmp_path / "a.h5"), max_rows_per_chunk=500, card=False)
    assert reader_on["received"] == 0
    monkeypatch.setenv(readproc.SWITCH, "0")
    b = build(recipe.with_overrides(out=tmp_path / "b.h5"), max_rows_per_chunk=500, card=False)
    assert sha256(a.path) == sha256(b.path)


def test_reader_is_left_out_for_small_builds_and_one_cpu(tmp_path, monkeypatch):
    info, recipe = demo(tmp_path, episodes=6)
    plan, source = make_plan(recipe)
    chunks = plan_shards(plan, 10)
    assert len(chunks) >= readproc.MIN_CHUNKS
    assert not readproc.wanted(source, chunks)            # under MIN_TRANSITIONS
    monkeypatch.setattr(readproc, "MIN_TRANSITIONS", 1)
    monkeypatch.setattr(readproc, "cpus", lambda: 2)
    assert readproc.wanted(source, chunks)
    monkeypatch.setattr(readproc, "cpus", lambda: 1)
    assert not readproc.wanted(source, chunks)


def test_reader_process_serves_per_file_logs(tmp_path):
    """Chunks of a folder of per-episode .npz files, read by the reader process, equal
    ``source.read`` of the same chunks (the arrays numpy wrote)."""
    rng = np.random.default_rng(9)
    folder = tmp_path / "eps"
    folder.mkdir()
    for i, T in enumerate([4, 2, 5, 3, 6, 2, 3]):
        np.savez(folder / f"ep{i}.npz", obs=rng.normal(size=(T + 1, 4)), act=rng.normal(size=(T, 2)).astype(np.float32),
                 rew=rng.normal(size=T).astype(np.float32))
    source = open_logs(folder, {"shape": "per-file", "file_pattern": "*.npz",
                                "keys": {"observation": "obs", "action": "act", "reward": "rew"}})
    bounds = [(0, 2), (2, 3), (3, 6), (6, 7)]
    reader = readproc.ChunkReader(source, bounds)
    try:
        for a, b in bounds:
            got, ref = reader.read(a, b), source.read(a, b)
            assert reader.proc is not None                     # delivered by the reader process
            for name in ("observations", "actions", "rewards", "offsets", "episode_ids"):
                x, y = getattr(got, name), getattr(ref, name)
                assert x.dtype == y.dtype and x.tobytes() == y.tobytes(), name
    finally:
        reader.close()
