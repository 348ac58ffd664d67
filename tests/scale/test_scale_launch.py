"""Worker start-up while the coordinator plans, the runners' submit hook, the payload by digest.

Real worker processes (the local spawn pool) and a real Dask LocalCluster of worker processes;
the built files are compared with the single-process build by SHA-256 (FIPS 180-4) of their
whole bytes, as in test_scale_identity.py.
"""

import os
import shutil
import time

import h5py
import numpy as np
import psutil
import pytest

from goalkit import heapkeep
from goalkit.errors import GoalkitError
from goalkit.pipeline.build import build
from goalkit.pipeline.buildfolder import PAYLOAD_FILE, folder_of
from goalkit.pipeline import dask_build
from goalkit.pipeline.dask_build import DaskRunner
from goalkit.pipeline.recipe import load_recipe
from goalkit.pipeline.shardfiles import ShardSpec
from goalkit.pipeline.workers import LocalRunner, Payload, warm_up

from conftest import sha256


def _pool_pids(runner):
    return {pid for pid, proc in runner.pool._processes.items() if proc.exitcode is None}


def test_launched_workers_run_before_any_payload_and_load_it_once_by_digest(tmp_path):
    runner = LocalRunner(2)
    try:
        runner.launch()
        assert runner.starter is not None               # launch() left the start to its thread
        assert runner.payload_ref is None
        runner.wait_started()
        assert len(_pool_pids(runner)) == 2                     # both started, before a payload exists
        assert {f.result(timeout=60) for f in runner.warm} <= _pool_pids(runner)
        # the submit hook runs a module-level function in a worker process, not here
        pid = runner.submit(warm_up).result(timeout=60)
        assert pid in _pool_pids(runner) and pid != os.getpid()
        runner.start(Payload(plan=None, source=None), tmp_path)
        path, digest = runner.payload_ref
        assert path == str(tmp_path / PAYLOAD_FILE) and len(digest) == 64
        # a payload file changed after it was written is refused by the task, as data, in one line
        (tmp_path / PAYLOAD_FILE).write_bytes(b"not the coordinator's payload")
        spec = ShardSpec(index=0, start=0, stop=1, first_episode=0, last_episode=0, transitions=3)
        (outcome,) = list(runner.run([spec], tmp_path, "key"))
        assert outcome["ok"] is False and outcome["index"] == 0
        assert "the payload file changed after the coordinator wrote it" in outcome["error"]["message"]
    finally:
        runner.close()
    assert runner.pool is None


def test_a_pool_launched_for_a_build_that_fails_while_planning_is_stopped_at_once(gantry, tmp_path):
    # The build starts its workers before it plans; a log that fails planning must stop them,
    # quickly and without leaving a process or a build folder behind.
    for name in ("gantry-logs.h5", "gantry-layout.toml", "scale-recipe.toml"):
        shutil.copy(gantry / name, tmp_path / name)
    with h5py.File(tmp_path / "gantry-logs.h5", "r+") as f:
        del f["bench/ep_00007/action"]                          # an episode group without its actions
    recipe = load_recipe(tmp_path / "scale-recipe.toml")
    me = psutil.Process()
    before = {p.pid for p in me.children(recursive=True)}
    started = time.monotonic()
    with pytest.raises(GoalkitError) as err:
        build(recipe, workers=2, card=False)
    took = time.monotonic() - started
    assert "ep_00007" in str(err.value) and "\n" not in str(err.value)
    left = [p for p in me.children(recursive=True) if p.pid not in before and p.is_running()
            and p.status() != psutil.STATUS_ZOMBIE]
    assert left == []
    assert not folder_of(recipe.output.path).exists() and not recipe.output.path.exists()
    assert took < 15
    from goalkit.logs import held
    assert not held.holding() and held._held == {}       # the planning's hold ended with the build


@pytest.fixture(scope="module")
def dask_client():
    """A client of a Dask LocalCluster of 2 single-threaded worker processes (shared by the tests below)."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(processes=True, n_workers=2, threads_per_worker=1,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        client.wait_for_workers(2)
        yield client


def test_dask_worker_processes_warm_up_while_planning_and_give_the_same_bytes(gantry, reference, tmp_path,
                                                                               dask_client):
    client = dask_client
    _, ref_digest = reference
    out = tmp_path / "scale-goals.h5"
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out)
    workers = set(client.run(os.getpid).values())           # the worker processes' ids
    assert len(workers) == 2 and os.getpid() not in workers
    runner = DaskRunner(client=client)
    try:
        runner.launch()
        assert {f.result(timeout=60) for f in runner.warm} == workers      # each worker warmed once
        assert runner.submit(warm_up).result(timeout=60) in workers        # the submit hook
    finally:
        runner.close()
    result = build(recipe, client=client, max_rows_per_chunk=3000, card=False)
    assert sha256(out) == ref_digest
    assert result.shards["computed"] == result.shards["total"] > 3
    assert result.shards["task_seconds"] >= result.shards["task_cpu_seconds"] > 0


def test_dask_workers_hold_the_logs_open_only_while_a_build_runs(gantry, reference, tmp_path, dask_client):
    # Each shard task reads its episodes from the log; the workers keep the file open from one
    # shard to the next while the runner is started, and close it (and stop holding) when the
    # runner closes: a user's long-lived cluster keeps no file of ours open after the build.
    from goalkit.logs import held

    client = dask_client
    _, ref_digest = reference
    out = tmp_path / "scale-goals.h5"
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out)
    assert set(client.run(held.holding).values()) == {False}
    # Dask's nanny starts its workers with a 64 KiB trim threshold (its pre-spawn environment);
    # the workers keep the memory a shard frees for the next one only while a build runs
    assert set(client.run(os.environ.get, "MALLOC_TRIM_THRESHOLD_").values()) == {"65536"}
    assert set(client.run(heapkeep.heap_held).values()) == {False}
    runner = DaskRunner(client=client)
    try:
        runner.start(Payload(plan=None, source=None), tmp_path)
        assert set(client.run(held.holding).values()) == {True}
        assert set(client.run(heapkeep.heap_held).values()) == {True}
    finally:
        runner.close()
    assert set(client.run(held.holding).values()) == {False}
    assert set(client.run(heapkeep.heap_held).values()) == {False}
    build(recipe, client=client, max_rows_per_chunk=3000, card=False)
    assert set(client.run(held.holding).values()) == {False}
    assert sha256(out) == ref_digest
    # the workers loaded the payload from the build folder, and forgot it with the build
    # (asked through eval: a function of this module would be unpickled on the workers by
    # importing the test module, whose conftest name collides with other test folders')
    kept = client.run(eval, "bool(__import__('goalkit.pipeline.workers', fromlist=['_WORKER'])._WORKER)"
                            " or bool(__import__('goalkit.pipeline.workers', fromlist=['_RESOLVED'])._RESOLVED)")
    assert set(kept.values()) == {False}


def test_dask_workers_hold_the_logs_from_the_launch(dask_client):
    # launch() (before the planning) asks each worker to import what a shard needs and to hold
    # the logs it will read; start() then has nothing more to ask, and close() undoes it
    from goalkit.logs import held

    client = dask_client
    # the scheduler records tasks only once its task-stream plugin is in (the first call adds
    # it); the trim tasks are tiny and could finish before a call made after close()
    client.get_task_stream(start=time.time())
    runner = DaskRunner(client=client)
    try:
        runner.launch()
        assert runner.warm and runner.holding
        client.gather(runner.warm)
        assert set(client.run(held.holding).values()) == {True}
        assert set(client.run(heapkeep.heap_held).values()) == {True}
    finally:
        since = time.time()
        runner.close()
    # and one task per worker thread gives back its heap's free top (not waited for by close)
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        trims = [t for t in client.get_task_stream(start=since) if t["key"].startswith("goalkit-trim-")]
        if len(trims) >= 2:
            break
        time.sleep(0.1)
    assert set(client.run(held.holding).values()) == {False}
    assert set(client.run(heapkeep.heap_held).values()) == {False}
    assert {t["worker"] for t in trims} == set(client.scheduler_info()["workers"])


def test_dask_workers_let_go_of_the_logs_while_the_last_rows_are_written(dask_client, tmp_path):
    # release() (the last shard is in) asks the workers to close their logs from a side thread,
    # so the closes overlap the coordinator's writing; close() joins that thread
    from goalkit.logs import held

    client = dask_client
    runner = DaskRunner(client=client)
    try:
        runner.start(Payload(plan=None, source=None), tmp_path)
        assert set(client.run(held.holding).values()) == {True}
        runner.release()
        assert runner.releaser is not None and runner.releaser.name == "goalkit-dask-release"
        runner.releaser.join(60)
        assert set(client.run(held.holding).values()) == {False}
        runner.release()                                   # once only
    finally:
        runner.close()
    assert runner.releaser is None
    assert set(client.run(held.holding).values()) == {False}


def test_the_coordinator_holds_its_log_while_it_plans_and_lets_go_after(gantry, reference, tmp_path,
                                                                        monkeypatch):
    # A sharded build's coordinator keeps the log open from the planning scan to the reads after
    # it (one open, one close) and closes it on a side thread once the shards are submitted;
    # after the build it holds nothing and no closing thread is left.
    import threading

    from goalkit.logs import grouped, held

    seen = []
    plan_groups = grouped.GroupedSource._plan_groups

    def watched(self, h5, *early):
        seen.append(held.holding())
        return plan_groups(self, h5, *early)

    monkeypatch.setattr(grouped.GroupedSource, "_plan_groups", watched)
    _, ref_digest = reference
    out = tmp_path / "scale-goals.h5"
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out)
    assert not held.holding()
    build(recipe, workers=2, max_rows_per_chunk=3000, card=False)
    assert seen == [True]
    assert not held.holding() and held._held == {}
    assert not [t for t in threading.enumerate() if t.name == "goalkit-log-close"]
    assert sha256(out) == ref_digest
    # a process that holds its logs itself keeps holding them (and its open file) after a build
    held.hold_logs(True)
    try:
        out.unlink()
        build(recipe, workers=2, max_rows_per_chunk=3000, card=False)
        assert held.holding() and list(held._held) == [str(gantry / "gantry-logs.h5")]
        assert sha256(out) == ref_digest
    finally:
        held.hold_logs(False)
    assert held._held == {}


def test_workers_report_how_busy_they_were(gantry, reference, tmp_path):
    _, ref_digest = reference
    out = tmp_path / "scale-goals.h5"
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out)
    result = build(recipe, workers=2, max_rows_per_chunk=4000, card=False)
    assert sha256(out) == ref_digest
    info = result.shards
    assert info["computed"] > 2
    # wall seconds of the tasks bound their threads' CPU seconds; both are positive
    assert info["task_seconds"] + 1e-3 >= info["task_cpu_seconds"] > 0
    assert np.isfinite(info["task_seconds"])


@pytest.mark.skipif(not hasattr(__import__("concurrent.futures.process").futures.process.ProcessPoolExecutor(1),
                                "_safe_to_dynamically_spawn_children"),
                    reason="this Python's process pool has no switch for starting processes on demand")
def test_every_worker_process_starts_before_the_pool_thread_that_could_tear_it_down(monkeypatch):
    # A spawn pool starts a process per submit while its manager thread already runs; a worker
    # dying then made Python 3.11's manager thread fail ("dictionary changed size during
    # iteration") and print a traceback beside the build's one line (seen once in CI, in the
    # start-up kill test of test_scale_resume.py). Every start must happen before that thread.
    from concurrent.futures import ProcessPoolExecutor

    seen = []
    original = ProcessPoolExecutor._spawn_process

    def spawn(pool):
        seen.append(pool._executor_manager_thread is None)
        return original(pool)

    monkeypatch.setattr(ProcessPoolExecutor, "_spawn_process", spawn)
    runner = LocalRunner(3)
    try:
        runner.launch()
        runner.wait_started()
        assert {f.result(timeout=60) for f in runner.warm} <= _pool_pids(runner)
        assert len(_pool_pids(runner)) == 3
        runner.submit(warm_up).result(timeout=60)          # later submits start nothing
    finally:
        runner.close()
    assert seen == [True, True, True]


def test_a_failing_pool_thread_prints_nothing_and_other_threads_still_do():
    # The pool's plumbing thread failing is reported by the build as a lost worker, in one line;
    # its traceback must not reach the user's terminal. Any other thread's exception still does.
    # (In a fresh interpreter: pytest replaces threading.excepthook around every test.)
    import subprocess
    import sys

    script = """
import threading
from concurrent.futures import process as pool_module
from goalkit.pipeline.workers import _quiet_pool_threads

_quiet_pool_threads()
_quiet_pool_threads()          # installed once however often called

class Plumbing(pool_module._ExecutorManagerThread):
    def __init__(self):
        threading.Thread.__init__(self, daemon=True)

    def run(self):
        raise RuntimeError("dictionary changed size during iteration")

def ordinary():
    raise RuntimeError("an ordinary thread's failure")

for thread in (Plumbing(), threading.Thread(target=ordinary)):
    thread.start()
    thread.join(10)
print("done")
"""
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0 and done.stdout == "done\n", done
    assert "dictionary changed size" not in done.stderr
    assert "an ordinary thread's failure" in done.stderr and done.stderr.count("Traceback") == 1


def test_a_dask_build_plans_its_helper_part_on_a_worker_of_this_machine(gantry, reference, helper_log, tmp_path,
                                                                         dask_client, monkeypatch):
    # The LocalCluster's workers run on this machine: one of them plans the helper's part of the
    # episode groups (it meets the coordinator through the shared-memory claims file), and no
    # helper interpreter is started.
    monkeypatch.delenv("GOALKIT_POOL_HELPER", raising=False)
    assert DaskRunner(client=dask_client).ready()
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=tmp_path / "dask-pooled.h5")
    build(recipe, client=dask_client, max_rows_per_chunk=3000, card=False)
    assert helper_log.seen == [("PoolSpare", True)]
    assert helper_log.started == []
    assert sha256(tmp_path / "dask-pooled.h5") == reference[1]


def test_a_cluster_with_workers_on_other_machines_keeps_the_logs_own_spare(gantry, reference, helper_log, tmp_path,
                                                                          dask_client, monkeypatch):
    # Workers elsewhere cannot open the claims file in this machine's shared memory: the logs'
    # own spare helper plans the helper's part. (The workers' addresses are made foreign by
    # taking this machine's own off the list.)
    monkeypatch.delenv("GOALKIT_POOL_HELPER", raising=False)
    monkeypatch.setattr(dask_build, "local_addresses", lambda: {"198.51.100.7"})
    assert not DaskRunner(client=dask_client).ready()
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=tmp_path / "dask-spared.h5")
    build(recipe, client=dask_client, max_rows_per_chunk=3000, card=False)
    assert helper_log.seen == [("Spare", True)] and helper_log.started == [1]
    assert sha256(tmp_path / "dask-spared.h5") == reference[1]


def test_this_machines_addresses_include_loopback_and_its_name():
    import socket

    found = dask_build.local_addresses()
    assert {"127.0.0.1", "localhost", socket.gethostname()} <= found


def test_workers_started_with_the_preload_have_imported_goalkit_and_hold_nothing(gantry, reference, tmp_path):
    # dask.distributed's documented worker preload (a module imported as each worker starts):
    # the modules of goalkit's tasks are in before any build, nothing is held open or changed,
    # and a build on such workers writes the single-process build's bytes
    distributed = pytest.importorskip("distributed")
    from goalkit.logs import held

    wanted = ["goalkit.logs.grouped", "goalkit.pipeline.dask_build", "goalkit.pipeline.poolspare",
              "goalkit.pipeline.workers", "h5py"]
    check = f"sorted(m for m in {wanted!r} if m in __import__('sys').modules)"
    # a dashboard on a free port: the module's other cluster may still hold the default one
    with distributed.LocalCluster(processes=True, n_workers=2, threads_per_worker=1, dashboard_address=":0",
                                  preload=["goalkit.dask_preload"]) as cluster, distributed.Client(cluster) as client:
        client.wait_for_workers(2)
        assert list(client.run(eval, check).values()) == [wanted, wanted]
        assert set(client.run(held.holding).values()) == {False}
        assert set(client.run(heapkeep.heap_held).values()) == {False}
        out = tmp_path / "preloaded.h5"
        recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out)
        build(recipe, client=client, max_rows_per_chunk=3000, card=False)
        assert sha256(out) == reference[1]
        assert set(client.run(held.holding).values()) == {False}
