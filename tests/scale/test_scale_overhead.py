"""What a sharded build saves over its first version: workers forked from one fork server, a
worker standing in for the logs' spare helper while the build plans, and the coordinator's
check of shard files its workers wrote in this run."""

import math
import os
import threading
import time
from dataclasses import replace
from types import SimpleNamespace

import numpy as np
import psutil
import pytest

from goalkit.logs import grouped, planspawn, spare
from goalkit.pipeline.build import build
from goalkit.pipeline.chunk import ChunkRows
from goalkit.pipeline.poolspare import POOL_STARTUP_SECONDS, PoolSpare
from goalkit.pipeline.recipe import load_recipe
from goalkit.pipeline.shardfiles import ShardError, plan_shards, read_shard, write_shard
from goalkit.pipeline.workers import LocalRunner

from conftest import change_value, sha256


def test_pool_spare_answers_like_a_spare_and_failures_read_as_none():
    with LocalRunner(1) as runner:
        runner.launch()
        helper = PoolSpare(runner)
        assert helper.alive and helper.proc is None
        # one answer per args, in order; a call that raises is a failed answer (None), not an error
        assert helper.send({"call": math.sqrt, "each": [(16.0,), (-1.0,), (2.25,)]})
        assert [helper.receive() for _ in range(3)] == [4.0, None, 1.5]
        assert helper.send({"call": math.factorial, "each": [(5,)]})
        assert helper.receive() == 120
        assert helper.receive() is None          # nothing asked: nothing to wait for
        helper.close()
        assert not helper.alive and not helper.send({"call": math.sqrt, "each": [(1.0,)]})


def test_pool_spare_gives_up_when_its_worker_dies():
    with LocalRunner(1) as runner:
        runner.launch()
        runner.wait_started()
        pid = runner.warm[0].result(timeout=60)
        helper = PoolSpare(runner, every=0.05)
        assert helper.send({"call": time.sleep, "each": [(30,)]})
        time.sleep(0.3)                           # the worker is inside the task
        os.kill(pid, 9)
        t0 = time.monotonic()
        assert helper.receive() is None           # a dead worker: no answer, and no hang
        assert time.monotonic() - t0 < 10
        assert not helper.send({"call": math.sqrt, "each": [(4.0,)]})   # the pool is gone


def test_sending_to_a_pool_still_starting_does_not_wait_for_it():
    # the coordinator plans its own part meanwhile: send() hands the task over on a side thread
    gate, left = threading.Event(), threading.Event()
    asked = []

    class Starting:
        broken = False

        def submit(self, fn, *args):
            asked.append(args)
            gate.wait(5)                      # as a pool whose fork server is still importing
            left.set()
            return SimpleNamespace(result=lambda timeout=None: fn(*args), cancel=lambda: False)

    helper = PoolSpare(Starting())
    assert helper.send({"call": math.sqrt, "each": [(81.0,)]})
    assert not left.is_set()                  # send returned while the pool was still blocked
    gate.set()
    assert helper.receive() == 9.0 and len(asked) == 1


def test_a_task_that_cannot_be_submitted_reads_as_a_failed_answer():
    class Broken:
        broken = False

        def submit(self, fn, *args):
            raise RuntimeError("cannot schedule new futures after shutdown")

    helper = PoolSpare(Broken(), every=0.05)
    assert helper.send({"call": math.sqrt, "each": [(4.0,)]})
    assert helper.receive() is None and not helper.alive     # the caller plans those episodes itself


def test_closing_cancels_a_task_submitted_after_the_close():
    gate = threading.Event()
    cancelled = threading.Event()

    class Slow:
        broken = False

        def submit(self, fn, *args):
            gate.wait(30)
            return SimpleNamespace(result=lambda timeout=None: None, cancel=cancelled.set)

    helper = PoolSpare(Slow())
    assert helper.send({"call": math.sqrt, "each": [(4.0,)]})
    helper.close()                              # before the pool took the task
    gate.set()
    assert cancelled.wait(30)                   # the task it then got is cancelled, not left to run


def test_a_pool_stand_in_counts_its_start_up_from_the_pool_launch(monkeypatch):
    # helper_split shares the groups so that both parts finish together: a helper still starting
    # gets fewer. A pool's workers start when it is launched (before the build plans), so the
    # start-up left is reckoned from then, not from when the stand-in was made.
    monkeypatch.setattr(planspawn, "cpus", lambda: 2)
    monkeypatch.delenv(planspawn.SWITCH, raising=False)
    total = 10_000
    warm = int(total * (1 + planspawn.MATCH_SECONDS / (total * planspawn.SECONDS_PER_GROUP)) / 2)
    cold = int(total * (1 + (planspawn.MATCH_SECONDS + POOL_STARTUP_SECONDS)
                        / (total * planspawn.SECONDS_PER_GROUP)) / 2)
    with LocalRunner(1) as runner:
        runner.launch()
        time.sleep(POOL_STARTUP_SECONDS + 0.01)
        stand_in = PoolSpare(runner)
        # its start-up is the pool's (POOL_STARTUP_SECONDS from the launch), told to the logs'
        # planning as a spare's start-up (STARTUP_SECONDS) from a later moment
        assert stand_in.started == pytest.approx(runner.launched_at + POOL_STARTUP_SECONDS
                                                 - planspawn.STARTUP_SECONDS)
        with spare.scope([], early=False):
            spare.give_back(stand_in)
            assert planspawn.helper_split(total) == warm
            helper = spare.take()
            assert helper.send({"call": math.sqrt, "each": [(9.0,)]}) and helper.receive() == 3.0
    # a stand-in whose runner says nothing of a launch counts as just started
    with spare.scope([], early=False):
        spare.give_back(PoolSpare(SimpleNamespace(broken=False)))
        assert abs(planspawn.helper_split(total) - cold) <= 5
        spare.take()
    assert warm < cold


def test_a_sharded_build_plans_its_helper_part_on_a_worker(gantry, reference, helper_log, tmp_path, monkeypatch):
    monkeypatch.delenv("GOALKIT_POOL_HELPER", raising=False)
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=tmp_path / "pooled.h5")
    build(recipe, workers=2, max_rows_per_chunk=3000, card=False)
    # the planning helper was a pool worker, it answered, and no helper interpreter was started
    assert helper_log.seen == [("PoolSpare", True)]
    assert helper_log.started == []
    assert sha256(tmp_path / "pooled.h5") == reference[1]


def test_the_stand_in_can_be_turned_off(gantry, reference, helper_log, tmp_path, monkeypatch):
    monkeypatch.setenv("GOALKIT_POOL_HELPER", "0")
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=tmp_path / "spared.h5")
    build(recipe, workers=2, max_rows_per_chunk=3000, card=False)
    assert helper_log.seen == [("Spare", True)] and helper_log.started == [1]
    assert sha256(tmp_path / "spared.h5") == reference[1]


def _spec_and_rows():
    spec = plan_shards(SimpleNamespace(lengths=np.array([4, 5]), episode_ids=np.array([2, 3])), 20)[0]
    g = np.random.default_rng(5)
    cols = {"source_episode": np.repeat(np.array([2, 3], np.int64), [8, 10]), "goal": g.normal(size=(18, 3))}
    return spec, ["source_episode", "goal"], ChunkRows({"train": cols}, {"train": np.arange(18, dtype=np.int64)})


def test_a_shard_written_in_this_run_is_checked_by_its_reported_digest_and_size(tmp_path):
    spec, order, rows = _spec_and_rows()
    info = write_shard(tmp_path, spec, "k", rows, order)
    path = tmp_path / spec.name
    assert info["bytes"] == path.stat().st_size
    written = (info["sha256"], info["bytes"])
    back = read_shard(tmp_path, spec, "k", order, written=written)
    np.testing.assert_array_equal(back.columns["train"]["goal"], rows.columns["train"]["goal"])
    # another file at the shard's name (another digest), or the file cut or grown: refused
    with pytest.raises(ShardError, match="rows do not match"):
        read_shard(tmp_path, spec, "k", order, written=("0" * 64, info["bytes"]))
    clean = path.read_bytes()
    for damaged in (clean[:-64], clean + bytes(64)):
        path.write_bytes(damaged)
        with pytest.raises(ShardError):
            read_shard(tmp_path, spec, "k", order, written=written)
    # the header still says what the worker wrote; a value changed afterwards is not rehashed on
    # this path (the run's own file, moments old), but a shard reused by a later run is
    # read without `written` and its whole SHA-256 catches it
    path.write_bytes(clean)
    change_value(path, "train/goal", 7)
    read_shard(tmp_path, spec, "k", order, written=written)
    with pytest.raises(ShardError, match="rows do not match"):
        read_shard(tmp_path, spec, "k", order)
    # the header's other checks still hold with `written`
    path.write_bytes(clean)
    with pytest.raises(ShardError, match="build_key"):
        read_shard(tmp_path, spec, "other", order, written=written)
    with pytest.raises(ShardError, match="stop"):
        read_shard(tmp_path, replace(spec, stop=1), "k", order, written=written)


def _new_processes(me, before):
    return [p for p in me.children(recursive=True) if p.pid not in before and p.is_running()
            and p.status() != psutil.STATUS_ZOMBIE and "resource_tracker" not in " ".join(p.cmdline())]


def test_local_workers_are_forked_by_one_server_that_is_stopped_with_the_pool(monkeypatch):
    monkeypatch.delenv("GOALKIT_WORKER_START", raising=False)
    me = psutil.Process()
    before = {p.pid for p in me.children(recursive=True)}
    with LocalRunner(2) as runner:
        runner.launch()
        runner.wait_started()
        for f in runner.warm:
            f.result(timeout=60)
        pids = list(runner.pool._processes)          # the pool's own map of its processes
        servers = [p for p in me.children() if p.pid not in before and "forkserver" in " ".join(p.cmdline())]
        assert len(servers) == 1 and len(pids) == 2
        assert {psutil.Process(pid).ppid() for pid in pids} == {servers[0].pid}
    left = _new_processes(me, before)
    assert left == [], [(p.pid, p.ppid(), p.cmdline()) for p in left]


def test_spawned_workers_give_the_same_bytes(gantry, reference, tmp_path, monkeypatch):
    monkeypatch.setenv("GOALKIT_WORKER_START", "spawn")
    me = psutil.Process()
    before = {p.pid for p in me.children(recursive=True)}
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=tmp_path / "spawned.h5")
    build(recipe, workers=2, max_rows_per_chunk=3000, card=False)
    assert sha256(tmp_path / "spawned.h5") == reference[1]
    left = _new_processes(me, before)
    assert left == [], [(p.pid, p.ppid(), p.cmdline()) for p in left]


def test_a_callers_own_fork_server_is_left_alone(monkeypatch):
    # goalkit used from Python beside the caller's own fork-server processes (data loaders, say):
    # the caller's server keeps running with its own preload list, and the workers are spawned
    import multiprocessing
    from multiprocessing import forkserver

    from goalkit.pipeline import workers

    monkeypatch.delenv("GOALKIT_WORKER_START", raising=False)
    context = multiprocessing.get_context("forkserver")
    server = forkserver._forkserver
    context.set_forkserver_preload(["json"])
    try:
        # not yet started: the pool starts its own and puts the caller's list back afterwards
        assert not workers._fork_server_running()
        with LocalRunner(1) as runner:
            runner.launch()
            runner.wait_started()
            assert runner.method == "forkserver" and runner.warm[0].result(timeout=60) > 0
        assert server._preload_modules == ["json"] and not workers._fork_server_running()
        # the caller's server is running: left alone, workers spawned
        with context.Pool(1) as theirs:
            assert theirs.apply(os.getpid) > 0
            pid = server._forkserver_pid
            with LocalRunner(1) as runner:
                runner.launch()
                runner.wait_started()
                assert runner.method == "spawn" and runner.warm[0].result(timeout=60) > 0
            assert server._forkserver_pid == pid and psutil.pid_exists(pid)
            assert server._preload_modules == ["json"]
            assert theirs.apply(os.getpid) > 0                  # their pool still works
    finally:
        context.set_forkserver_preload([])
        workers._stop_fork_server(None)


def test_a_launch_under_way_is_waited_for_by_another_threads_submit(monkeypatch):
    # A pool stand-in submits from a thread of its own ("goalkit-pool-send") and may be first
    # to launch the pool; a second thread's submit meanwhile must wait until the starting thread
    # exists and has started (it once joined a thread not yet started, or skipped the wait and
    # submitted ahead of the workers' warm-up). The launch is slowed to widen that window.
    from goalkit.pipeline import workers

    real = workers._start_all_at_once

    def slow(pool):
        time.sleep(0.3)
        real(pool)

    monkeypatch.setattr(workers, "_start_all_at_once", slow)
    errors, warmed_before_second = [], []
    with LocalRunner(1) as runner:
        def first():
            try:
                runner.submit(math.sqrt, 4.0).result(timeout=60)
            except Exception as exc:        # noqa: BLE001  reported below
                errors.append(exc)

        a = threading.Thread(target=first)
        a.start()
        time.sleep(0.1)                     # the first thread is inside the launch now
        fut = runner.submit(math.sqrt, 9.0)
        warmed_before_second.append(len(runner.warm))
        assert fut.result(timeout=60) == 3.0
        a.join(timeout=60)
    assert errors == []
    assert warmed_before_second == [1]      # the warm-up went first, as for a single caller
