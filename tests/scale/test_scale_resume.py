"""Crash safety and resume: real `goalkit build --workers 2` processes killed with SIGKILL.

After every kill nothing is at the output path; re-running the same command resumes from the
finished shards, and the final file is byte-identical (SHA-256, FIPS 180-4) to the
uninterrupted single-process build.
"""

import json
import os
import re
import signal
import subprocess
import time

import numpy as np
import psutil
import pytest

from goalkit.pipeline.buildfolder import PAYLOAD_FILE, folder_of
from goalkit.pipeline.shardfiles import shard_meta

from conftest import GOALKIT, change_value, sha256

SHARD_ROWS = "1000"  # about 200 transitions per shard: ~54 shards for the 240-episode logs


def command(gantry, out, *extra):
    return [GOALKIT, "build", str(gantry / "scale-recipe.toml"), "--out", str(out), "--workers", "2",
            "--chunk-rows", SHARD_ROWS, "--json", "--quiet", *extra]


def shard_files(out):
    folder = folder_of(out)
    return sorted(folder.glob("shard-*.npz")) if folder.exists() else []


def run_and_kill(cmd, when, timeout=60.0):
    """Start ``cmd``; SIGKILL it as soon as ``when()`` is true; return the processes it had."""
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    family = []
    deadline = time.monotonic() + timeout
    while not when():
        assert proc.poll() is None, f"the build ended before the kill point: {proc.communicate()}"
        assert time.monotonic() < deadline
        time.sleep(0.002)
    try:
        family = psutil.Process(proc.pid).children(recursive=True)
    except psutil.NoSuchProcess:
        pass
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(10)
    assert proc.returncode == -signal.SIGKILL
    return family


def assert_no_orphans(family, within=5.0):
    deadline = time.monotonic() + within
    alive = family
    while alive and time.monotonic() < deadline:
        alive = [p for p in alive if p.is_running() and p.status() != psutil.STATUS_ZOMBIE]
        time.sleep(0.05)
    assert not alive, f"worker processes outlived the killed build: {alive}"


def finish(cmd):
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout)


def test_killed_three_times_then_resumed_is_identical(gantry, reference, tmp_path):
    _, ref_digest = reference
    out = tmp_path / "scale-goals.h5"
    cmd = command(gantry, out)
    # 1: as soon as the build folder has its key file (shards may or may not have started)
    family = run_and_kill(cmd, lambda: (folder_of(out) / "build.json").exists())
    assert not out.exists()
    assert_no_orphans(family)
    # 2: once a few shard files exist; 3: once most do (the resumed run adds to them)
    for at_least in (4, 30):
        family = run_and_kill(cmd, lambda: len(shard_files(out)) >= at_least)
        assert not out.exists()
        assert_no_orphans(family)
    finished = len(shard_files(out))
    assert finished >= 30
    report = finish(cmd)
    assert report["shards"]["reused"] >= 30
    assert report["shards"]["reused"] + report["shards"]["computed"] == report["shards"]["total"]
    assert sha256(out) == ref_digest
    # no build folder and no temporary file of the killed runs left beside the output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scale-goals.h5", "scale-goals.h5.card-goals.png",
                                                          "scale-goals.h5.card.md"]  # the set and its card


def test_changed_seed_clears_old_shards_and_a_corrupt_shard_is_recomputed(gantry, tmp_path):
    from goalkit.pipeline.build import build
    from goalkit.pipeline.recipe import load_recipe

    ref = tmp_path / "ref7.h5"
    build(load_recipe(gantry / "scale-recipe.toml").with_overrides(out=ref, seed=7))
    out = tmp_path / "scale-goals.h5"
    assert_no_orphans(run_and_kill(command(gantry, out), lambda: len(shard_files(out)) >= 6))
    old_key = shard_meta(shard_files(out)[0])["build_key"]
    # another seed: another build key; the old shards go before any new one is written
    cmd7 = command(gantry, out, "--seed", "7")
    key_file = folder_of(out) / "build.json"

    def new_shards():  # build.json is briefly absent while the new run clears the folder
        try:
            key = json.loads(key_file.read_text())["key"]
        except FileNotFoundError:
            return False
        return key != old_key and len(shard_files(out)) >= 4

    assert_no_orphans(run_and_kill(cmd7, new_shards))
    keys = {shard_meta(p)["build_key"] for p in shard_files(out)}
    assert len(keys) == 1 and old_key not in keys
    # change one stored value of a finished shard: its checksum no longer matches, so it is redone
    shards = shard_files(out)
    change_value(shards[1], "train/reward", 0)
    report = finish(cmd7)
    assert report["shards"]["reused"] == len(shards) - 1
    assert sha256(out) == sha256(ref)


def _workers(pid, seen):
    """The pool's worker processes of the build process ``pid``: spawned interpreters, or the
    processes its fork server forked (they carry the server's command line and have the server
    as their parent). The server also runs a short command while it imports h5py (``uname
    -p``, from ``platform``), which has the server's command line until it execs: a child of
    the server counts once ``seen`` (pid -> first seen, kept by the caller) says it has had
    that command line for 50 ms."""
    out = []
    now = time.monotonic()
    for child in psutil.Process(pid).children(recursive=True):
        try:
            cmd = " ".join(child.cmdline())
            if "spawn_main" in cmd:
                out.append(child)
            elif "forkserver" in cmd and child.ppid() != pid:
                if now - seen.setdefault(child.pid, now) >= 0.05:
                    out.append(child)
            else:
                seen.pop(child.pid, None)
        except psutil.Error:
            pass
    return out


def _partial_shards(out):
    """pid -> temporary shard file currently being written by that worker."""
    from goalkit.outputs import parse_temporary

    folder = folder_of(out)
    found = {}
    for p in folder.iterdir() if folder.exists() else []:
        parts = parse_temporary(p.name)
        if parts is not None and parts["stem"].startswith("shard-"):
            found[parts["pid"]] = p
    return found


def _kill_at(proc, out, moment, deadline):
    """Wait for ``moment`` of the build's life and SIGKILL one worker; return the kill time."""
    writing, seen = set(), {}
    payload = folder_of(out) / PAYLOAD_FILE
    while True:
        assert proc.poll() is None, f"the build ended before the kill point ({moment}): {proc.communicate()}"
        assert time.monotonic() < deadline, f"never reached the kill point {moment}"
        workers = _workers(proc.pid, seen)
        victim = None
        if moment == "start-up" and workers:
            victim = workers[0].pid            # just spawned: still starting its interpreter
        elif moment == "loading" and workers and payload.exists():
            victim = workers[0].pid            # the payload was just written: loading it, or a first shard
        elif moment == "mid-shard" and len(shard_files(out)) >= 3 and len(workers) == 2:
            victim = workers[0].pid
        elif moment in ("writing", "after-writing"):
            partial = _partial_shards(out)
            if moment == "writing" and partial:
                victim = next(iter(partial))   # its shard file is half written
            elif moment == "after-writing":
                gone = [pid for pid in writing if pid not in partial]
                writing = set(partial)
                if gone and len(shard_files(out)) >= 2:
                    victim = gone[0]           # it has just renamed its shard into place
        if victim is not None:
            try:
                os.kill(victim, signal.SIGKILL)
            except ProcessLookupError:
                continue
            return time.monotonic()
        time.sleep(0.001)


#: Moments of a worker's life at which it is killed (each must stop the build in one line).
#: Start-up is tried three times: a worker dying as the pool starts it could go unnoticed by the
#: pool (about one run in two hung before the runner checked its workers' liveness).
KILL_MOMENTS = ("start-up", "start-up", "start-up", "loading", "mid-shard", "writing", "after-writing")


@pytest.mark.parametrize("moment", KILL_MOMENTS)
def test_a_worker_killed_at_any_moment_stops_the_build_in_one_line(gantry, tmp_path, moment):
    # A hang fails the test: the build must exit (status 2) within seconds of the kill.
    out = tmp_path / "scale-goals.h5"
    proc = subprocess.Popen(command(gantry, out), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        killed = _kill_at(proc, out, moment, time.monotonic() + 60)
        _, err = proc.communicate(timeout=EXIT_WITHIN)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
    took = time.monotonic() - killed
    assert proc.returncode == 2, (moment, err)
    line = err.strip()
    assert "\n" not in line and "Traceback" not in line, line
    assert re.search(r"shard \d+ \(episodes \d+\.\.\d+\): a worker process died", line), line
    assert took < EXIT_WITHIN
    print(f"worker killed at {moment}: build exited 2 after {took:.2f} s")
    assert not out.exists()
    # every finished shard is kept and checks out for the next run
    for p in shard_files(out):
        assert shard_meta(p)["format"] == "goalkit-shard"


#: Seconds a build may take to stop after one of its workers is killed.
EXIT_WITHIN = 15


def test_a_killed_worker_stops_the_build_in_one_line_and_the_rerun_resumes(gantry, reference, tmp_path):
    _, ref_digest = reference
    out = tmp_path / "scale-goals.h5"
    cmd = command(gantry, out)
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while len(shard_files(out)) < 3:
        assert proc.poll() is None and time.monotonic() < deadline
        time.sleep(0.002)
    seen = {}
    _workers(proc.pid, seen)
    time.sleep(0.06)
    workers = _workers(proc.pid, seen)
    assert len(workers) == 2
    os.kill(workers[0].pid, signal.SIGKILL)
    try:
        _, err = proc.communicate(timeout=EXIT_WITHIN)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 2
    line = err.strip()
    assert "\n" not in line and "Traceback" not in line
    assert re.search(r"shard \d+ \(episodes \d+\.\.\d+\): a worker process died", line), line
    assert not out.exists() and len(shard_files(out)) >= 3
    report = finish(cmd)
    assert report["shards"]["reused"] >= 3
    assert sha256(out) == ref_digest


def test_a_pool_broken_while_shards_are_handed_out_reports_a_lost_worker(tmp_path):
    # The race the start-up kill can hit: a worker dies before every shard is submitted, so
    # submitting the next one raises BrokenProcessPool in the coordinator (not in a future).
    from concurrent.futures.process import BrokenProcessPool

    from goalkit.pipeline.shardfiles import ShardSpec
    from goalkit.pipeline.workers import LocalRunner, Payload

    specs = [ShardSpec(index=i, start=i, stop=i + 1, first_episode=i, last_episode=i, transitions=5)
             for i in range(4)]
    runner = LocalRunner(1)
    try:
        runner.start(Payload(plan=None, source=None), tmp_path)
        assert (tmp_path / "payload.pickle").is_file()
        dying = runner.pool.submit(os._exit, 1)      # the worker process ends abruptly
        assert isinstance(dying.exception(timeout=EXIT_WITHIN), BrokenProcessPool)
        outcomes = list(runner.run(specs, tmp_path, "key"))
    finally:
        started = time.monotonic()
        runner.close()
        assert time.monotonic() - started < EXIT_WITHIN
    assert [o["index"] for o in outcomes] == [0]
    assert outcomes[0]["ok"] is False and outcomes[0]["error"]["type"] == "WorkerLost"
