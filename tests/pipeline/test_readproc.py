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
