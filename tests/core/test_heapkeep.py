"""goalkit.heapkeep: freed memory is kept for reuse while asked, and glibc's settings come back
exactly after.

The expectations come from glibc's documented malloc behaviour (mallopt(3), Linux man-pages,
"M_MMAP_THRESHOLD" and "M_TRIM_THRESHOLD"): a block of at least the mmap threshold is mapped
afresh and unmapped when freed; free memory above the trim threshold at the top of a heap is
given back to the system; setting either threshold (also through ``MALLOC_TRIM_THRESHOLD_``)
turns the dynamic adjustment of both off. Each case runs in a fresh interpreter with the
environment under test, and counts the minor page faults (getrusage(2), ``ru_minflt`` of the
thread) of rounds that allocate ten 1 MiB arrays, write every page, and free them. Memory
mapped or given back afresh faults every page again, 256 per MiB; memory kept does not.
"""

import json
import os
import subprocess
import sys
import textwrap

import pytest

pytestmark = pytest.mark.skipif(not (os.confstr("CS_GNU_LIBC_VERSION") or "").startswith("glibc"),
                                reason="glibc's malloc only")

PAGES_PER_ROUND = 10 * (1 << 20) // 4096        # ten 1 MiB arrays, every page written

PROBE = textwrap.dedent("""
    import json, resource, sys, threading
    import numpy as np
    from goalkit import heapkeep

    def faults(rounds=6):
        # per round after two warm-up rounds: allocate ten 1 MiB arrays, write them, free them
        out = []
        for i in range(rounds + 2):
            before = resource.getrusage(resource.RUSAGE_THREAD).ru_minflt
            arrays = [np.ones(1 << 17) for _ in range(10)]
            del arrays
            if i >= 2:
                out.append(resource.getrusage(resource.RUSAGE_THREAD).ru_minflt - before)
        return max(out)

    def step(name, seen):
        if name == "hold":
            seen["hold"] = heapkeep.hold_heap()
        elif name == "release":
            seen["release"] = heapkeep.release_heap()
        elif name == "keep":
            seen["keep"] = heapkeep.keep_heap_here()
        elif name == "trim":
            seen.setdefault("trim", []).append(heapkeep.trim_thread_heap())
        elif name == "rss":   # resident bytes now
            with open("/proc/self/statm") as f:
                seen.setdefault("rss", []).append(int(f.read().split()[1]) * 4096)
        else:
            seen.setdefault("faults", []).append(faults())

    # steps run on the main thread, or with "@worker" on one long-lived thread of its own, as a
    # Dask worker's tasks run on its executor thread (with a heap of its own)
    import queue
    jobs, done = queue.Queue(), queue.Queue()

    def worker():
        while True:
            job = jobs.get()
            if job is None:
                return
            step(job, seen)
            done.put(job)

    steps, seen = json.loads(sys.argv[1]), {}
    thread = threading.Thread(target=worker)
    thread.start()
    for item in steps:
        name, _, where = item.partition("@")
        if where == "worker":
            jobs.put(name)
            done.get()
        else:
            step(name, seen)
    jobs.put(None)
    thread.join()
    print(json.dumps(seen))
""")


def _probe(steps, env, threaded=False) -> dict:
    if threaded:
        steps = [f"{s}@worker" if "@" not in s else s for s in steps]
    base = {k: v for k, v in os.environ.items()
            if not k.startswith("MALLOC_") and k not in ("GLIBC_TUNABLES", "GOALKIT_KEEP_HEAP")}
    out = subprocess.run([sys.executable, "-c", PROBE, json.dumps(steps)],
                         env={**base, **env}, capture_output=True, text=True, timeout=120, check=True)
    return json.loads(out.stdout)


DASK_NANNY = {"MALLOC_TRIM_THRESHOLD_": "65536"}   # what Dask's nanny sets for its workers


@pytest.mark.parametrize("threaded", [True, False], ids=["worker-thread", "main-thread"])
def test_a_held_heap_reuses_memory_and_releasing_it_gives_the_memory_back(threaded):
    res = _probe(["count", "hold", "count", "rss", "release", "rss", "count"], DASK_NANNY, threaded)
    before, held, after = res["faults"]
    assert res["hold"] is True and res["release"] is True
    # 1 MiB blocks are above the fixed 128 KiB mmap threshold: every page faults, every round
    assert before >= 0.9 * PAGES_PER_ROUND
    # held: the blocks come from the heap, kept between rounds
    assert held <= 0.05 * PAGES_PER_ROUND
    # released: the ten blocks kept free are given back to the system (malloc_trim)
    assert res["rss"][0] - res["rss"][1] >= 0.8 * 10 * (1 << 20)
    if not threaded:
        # and the main heap is as before (mmap threshold 128 KiB, trim threshold 64 KiB); a
        # thread's own heap keeps free blocks in its bins after any setting (glibc trims only
        # its top), so there the first blocks freed after the release are reused
        assert after >= 0.9 * PAGES_PER_ROUND


def test_holding_twice_holds_once_and_releasing_twice_releases_once():
    res = _probe(["hold", "hold", "release", "release", "count"], DASK_NANNY, threaded=True)
    assert res["hold"] is True and res["release"] is False     # the last release found nothing held
    assert res["faults"][0] >= 0.9 * PAGES_PER_ROUND


@pytest.mark.parametrize("env", [
    {},                                                           # dynamic thresholds: cannot be put back
    {"MALLOC_TRIM_THRESHOLD_": "65536", "MALLOC_MMAP_THRESHOLD_": "131072"},   # another setting
    {"MALLOC_TRIM_THRESHOLD_": "65536", "GLIBC_TUNABLES": "glibc.malloc.top_pad=0"},
    {"MALLOC_TRIM_THRESHOLD_": "a lot"},                          # not a number
    {"MALLOC_TRIM_THRESHOLD_": "65536", "GOALKIT_KEEP_HEAP": "0"},   # switched off
], ids=["unset", "mmap-set", "tunable", "not-a-number", "switched-off"])
def test_the_heap_is_held_only_when_the_settings_in_force_are_known(env):
    res = _probe(["hold", "count", "release"], env, threaded=True)
    assert res["hold"] is False and res["release"] is False
    if "MALLOC_TRIM_THRESHOLD_" in env and "GOALKIT_KEEP_HEAP" not in env and env["MALLOC_TRIM_THRESHOLD_"] == "65536" \
            and "MALLOC_MMAP_THRESHOLD_" in env:
        assert res["faults"][0] >= 0.9 * PAGES_PER_ROUND   # the user's thresholds stand untouched


def test_our_own_processes_keep_their_heap_for_good_unless_the_user_set_malloc():
    # dynamic thresholds (nothing set): the top of the heap beyond twice the largest block freed
    # is given back, so ten 1 MiB blocks freed together fault again every round
    plain = _probe(["count", "keep", "count"], {})
    assert plain["keep"] is True
    assert plain["faults"][0] >= 0.9 * PAGES_PER_ROUND
    assert plain["faults"][1] <= 0.05 * PAGES_PER_ROUND
    # a variable the user set is kept as it is
    user = _probe(["keep", "count"], {"MALLOC_ARENA_MAX": "2", "MALLOC_TRIM_THRESHOLD_": "65536"})
    assert user["keep"] is False and user["faults"][0] >= 0.9 * PAGES_PER_ROUND
    off = _probe(["keep", "count"], {"GOALKIT_KEEP_HEAP": "0"})
    assert off["keep"] is False and off["faults"][0] >= 0.9 * PAGES_PER_ROUND


def test_after_the_release_the_task_thread_gives_back_what_its_heap_kept():
    # As on a Dask worker: the shards run on the executor thread, the release comes from another
    # thread (the event loop, here the main thread), then goalkit's small trim task runs on the
    # executor thread (dask_build.trim_after_build).
    res = _probe(["hold", "trim@worker", "count@worker", "rss", "release", "trim@worker", "rss"], DASK_NANNY)
    assert res["hold"] is True and res["release"] is True
    assert res["trim"] == [False, True]                       # refused while the heap is held
    assert res["faults"][0] <= 0.05 * PAGES_PER_ROUND          # held while the task thread worked
    assert res["rss"][0] - res["rss"][1] >= 0.8 * 10 * (1 << 20)   # the ten blocks kept are given back
