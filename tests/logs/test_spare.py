"""The build's spare helper process (goalkit/logs/spare.py).

Reference: the same build with no helper process at all (``GOALKIT_SPARE``,
``GOALKIT_PLAN_HELPER`` and ``GOALKIT_READ_PROCESS`` off): the spare may only change the timing,
so the file's SHA-256 must be the same; and no helper process may outlive its build.
"""

from __future__ import annotations

import hashlib
import os

import pytest
from logs_testdata import make_episodes, write_flat, write_grouped, write_per_file

from goalkit.demo import make_demo
from goalkit.logs import open_logs, planspawn, spare
from goalkit.pipeline import readproc
from goalkit.pipeline.build import build, helped_layout
from goalkit.pipeline.recipe import load_recipe


def sha256(path) -> str:
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


@pytest.fixture
def small_logs_count(monkeypatch):
    """Helpers for a 40-episode demo; records every helper process started."""
    monkeypatch.setattr(spare, "WARM_BYTES", 1)
    monkeypatch.setattr(spare, "cpus", lambda: 2)
    monkeypatch.setattr(planspawn, "cpus", lambda: 2)
    monkeypatch.setattr(readproc, "cpus", lambda: 2)
    monkeypatch.setattr(planspawn, "MIN_GROUPS", 4)
    monkeypatch.setattr(readproc, "MIN_TRANSITIONS", 1)
    started = []
    real = spare.Spare.start.__func__

    def counted(cls):
        helper = real(cls)
        started.append(helper)
        return helper

    monkeypatch.setattr(spare.Spare, "start", classmethod(counted))
    return started


def demo(tmp_path, episodes=40):
    info = make_demo(tmp_path / "demo", episodes=episodes, seed=5)
    return load_recipe(info["recipe"])


def no_helpers(monkeypatch):
    for switch in (spare.SWITCH, planspawn.SWITCH, readproc.SWITCH):
        monkeypatch.setenv(switch, "0")


def test_one_spare_plans_then_reads_and_is_gone_after(tmp_path, small_logs_count, monkeypatch):
    recipe = demo(tmp_path)
    plans, reads = [], []
    monkeypatch.setattr("goalkit.logs.grouped.start_helper",
                        lambda source, split, *groups, **kw: plans.append(planspawn.start_helper(source, split, *groups, **kw))
                        or plans[-1])
    real_start = readproc.ChunkReader._start

    def start(self):
        real_start(self)
        reads.append(self.helper)

    monkeypatch.setattr(readproc.ChunkReader, "_start", start)
    a = build(recipe.with_overrides(out=tmp_path / "a.h5"), max_rows_per_chunk=500, card=False)
    assert len(small_logs_count) == 1                       # one process, started once
    assert plans and reads and plans[0] is reads[0] is small_logs_count[0]
    assert small_logs_count[0].proc is None                 # stopped with the build
    assert spare.waiting_for() is None
    no_helpers(monkeypatch)
    b = build(recipe.with_overrides(out=tmp_path / "b.h5"), max_rows_per_chunk=500, card=False)
    assert sha256(a.path) == sha256(b.path)


def test_a_spare_nobody_takes_is_stopped_with_the_scope(small_logs_count, tmp_path):
    log = tmp_path / "x.bin"
    log.write_bytes(b"0" * 64)
    with spare.scope([log]):
        assert spare.waiting_for() is not None
        proc = small_logs_count[0].proc
    assert spare.waiting_for() is None and proc.poll() is not None


def test_small_logs_and_one_cpu_start_no_spare(monkeypatch, tmp_path):
    log = tmp_path / "x.bin"
    log.write_bytes(b"0" * 64)
    monkeypatch.setattr(spare, "cpus", lambda: 2)
    assert not spare.wanted([log])                          # under WARM_BYTES
    monkeypatch.setattr(spare, "WARM_BYTES", 64)
    assert spare.wanted([log]) and spare.wanted([tmp_path])  # a folder counts with its files
    monkeypatch.setattr(spare, "cpus", lambda: 1)
    assert not spare.wanted([log])
    monkeypatch.setattr(spare, "cpus", lambda: 2)
    monkeypatch.setenv(spare.SWITCH, "0")
    assert not spare.wanted([log])


def test_a_dead_spare_is_replaced_and_the_bytes_stay(tmp_path, small_logs_count, monkeypatch):
    recipe = demo(tmp_path)
    real_scope_enter = spare.scope.__enter__

    def enter_then_kill(self):
        out = real_scope_enter(self)
        waiting = small_logs_count[-1].proc if small_logs_count else None
        if waiting is not None:                             # dies while it waits
            waiting.kill()
            waiting.wait()
        return out

    monkeypatch.setattr(spare.scope, "__enter__", enter_then_kill)
    before = len(small_logs_count)
    a = build(recipe.with_overrides(out=tmp_path / "a.h5"), max_rows_per_chunk=500, card=False)
    assert len(small_logs_count) >= before + 2              # a fresh process took over
    no_helpers(monkeypatch)
    b = build(recipe.with_overrides(out=tmp_path / "b.h5"), max_rows_per_chunk=500, card=False)
    assert sha256(a.path) == sha256(b.path)


def test_a_failed_call_is_answered_and_the_next_is_served():
    helper = spare.Spare.start()
    try:
        assert helper.send({"call": os.path.getsize, "each": [("/nonexistent/goalkit",), (os.devnull,)]})
        assert helper.receive() is None and helper.alive    # failed there; the process goes on
        assert helper.receive() == 0
        assert helper.send({"call": divmod, "each": [(7, 2)]})
        assert helper.receive() == (3, 1)
    finally:
        helper.close()
    assert helper.proc is None


def test_readers_that_want_helpers_start_the_spare_as_they_open(tmp_path, small_logs_count):
    """Grouped and per-file logs start a spare as they are opened inside a scope (their planning
    helper and chunk reader will take it); a flat log, read in large slices, does not."""
    eps = make_episodes([4, 3, 5, 2, 6, 3], seed=21)
    flat = write_flat(tmp_path / "flat.h5", eps)
    grouped = write_grouped(tmp_path / "g.h5", eps)
    per_file = write_per_file(tmp_path / "eps", eps)
    with spare.scope([tmp_path / "flat.h5"], early=False):
        open_logs(tmp_path / "flat.h5", flat)
        assert small_logs_count == [] and spare.waiting_for() is None
    for path, table in ((tmp_path / "g.h5", grouped), (tmp_path / "eps", per_file)):
        before = len(small_logs_count)
        with spare.scope([path], early=False):
            open_logs(path, table)
            assert len(small_logs_count) == before + 1 and spare.waiting_for() is not None
            proc = small_logs_count[-1].proc
        assert proc.poll() is not None                    # stopped with the scope
    open_logs(tmp_path / "g.h5", grouped)                 # outside a scope: nothing starts
    assert len(small_logs_count) == 2


def test_the_demo_recipe_names_a_layout_the_helpers_serve(tmp_path):
    recipe = demo(tmp_path, episodes=4)
    assert helped_layout(recipe)


def test_a_large_request_does_not_wait_for_a_spare_that_is_still_starting(tmp_path):
    # a pipe holds 64 KiB: a larger request to a process that reads nothing yet (a spare still
    # importing) is written on a side thread, and the caller goes on at once
    import subprocess
    import sys
    import time

    proc = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
    helper = spare.Spare(proc)
    try:
        t0 = time.monotonic()
        assert helper.send({"call": len, "each": [("x" * (256 << 10),)]})
        assert time.monotonic() - t0 < 1.0
        assert helper._sending is not None and helper._sending[0].is_alive()   # still writing
        small = spare.Spare.start()
        try:       # one large request then a small one, in order, to a real spare
            assert small.send({"call": len, "each": [("y" * (256 << 10),)]})
            assert small.send({"call": len, "each": [("zz",)]})
            assert small.receive() == 256 << 10 and small.receive() == 2
        finally:
            small.close()
    finally:
        t0 = time.monotonic()
        helper.close()                       # the write fails once the process is gone
        assert time.monotonic() - t0 < 10 and helper._sending is None
    assert proc.poll() is not None
