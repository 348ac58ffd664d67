"""The shard task and the local worker pool.

Every worker gets the build's :class:`Payload` once (the plan and the opened log's index, no
log arrays): at process start for the local pool, by one ``scatter`` for Dask. Large plan
objects (the goal table; later a neighbour index) are spilled by the coordinator to files in the
build folder and memory-mapped by each worker, so they cross no pipe and local workers share
their pages. A task gets only a :class:`~goalkit.pipeline.shards.ShardSpec`: it reads its
episodes from the logs itself, relabels them and writes a shard file. It never raises: it returns
``{"ok": True, ...}`` or ``{"ok": False, "error": {...}}``, so any failure reaches the
coordinator as plain data whatever the transport.

The local pool is a :class:`concurrent.futures.ProcessPoolExecutor` with the ``spawn`` context:
no fork of a coordinator that holds open HDF5 files and threads, no Dask scheduler or ports for a
one-machine build, and a start-up of about a second. Each worker watches its parent and exits
when the coordinator is gone (a SIGKILLed build leaves no orphans working on).
"""

from __future__ import annotations

import os
import threading
import time
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from goalkit.errors import GoalkitError
from goalkit.pipeline.shards import write_shard

#: Goal tables larger than this are spilled to a memory-mapped file instead of pickled.
SPILL_BYTES = 1 << 20
GOAL_TABLE_FILE = "goal-table.npy"


@dataclass(frozen=True)
class Payload:
    """What every worker needs besides its shard.

    Attributes
    ----------
    plan : BuildPlan
        The plan, possibly with ``goal_table`` spilled (then None here).
    source : LogSource
        The coordinator's opened log: paths and per-episode index, no arrays; the worker opens
        the files itself when it reads its shard.
    goal_table_file : str or None
        Where the spilled goal table is (a ``.npy`` file, memory-mapped read-only).
    """

    plan: object
    source: object
    goal_table_file: str | None = None

    def resolve(self):
        """The plan with its spilled objects mapped back in."""
        if self.goal_table_file is None:
            return self.plan
        table = np.load(self.goal_table_file, mmap_mode="r")
        return replace(self.plan, goal_table=table)


def make_payload(plan, source, folder: Path, spill: bool = True) -> Payload:
    """Build the payload; with ``spill``, write a large goal table to ``folder`` (temp + rename)."""
    table = plan.goal_table
    if not spill or table is None or table.nbytes <= SPILL_BYTES:
        return Payload(plan, source)
    path = Path(folder) / GOAL_TABLE_FILE
    tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")
    try:
        with open(tmp, "wb") as f:
            np.save(f, np.ascontiguousarray(table), allow_pickle=False)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return Payload(replace(plan, goal_table=None), source, str(path))


def failure(spec, exc: BaseException) -> dict:
    """A task outcome describing ``exc`` as plain data."""
    err = {"type": type(exc).__name__, "message": str(exc), "goalkit": isinstance(exc, GoalkitError),
           "os_error": isinstance(exc, OSError), "errno": getattr(exc, "errno", None)}
    if isinstance(exc, GoalkitError):
        err.update(message=exc.message, file=exc.file, key=exc.key, episode=exc.episode, step=exc.step)
    return {"ok": False, "index": spec.index, "error": err}


def run_shard(payload: Payload, spec, folder, build_key: str) -> dict:
    """Read, relabel and write one shard (the task every worker runs).

    Parameters
    ----------
    payload : Payload
    spec : ShardSpec
    folder : str or Path
        The build folder (shared with the coordinator).
    build_key : str

    Returns
    -------
    dict
        ``{"ok": True, "index", "rows", "sha256", "seconds"}`` or ``{"ok": False, "index", "error"}``.
    """
    from goalkit.pipeline.chunk import relabel_chunk

    t0 = time.perf_counter()
    try:
        plan = _resolved(payload)
        chunk = payload.source.read(spec.start, spec.stop)
        rows = relabel_chunk(plan, chunk)
        info = write_shard(folder, spec, build_key, rows, list(plan.columns))
    except Exception as exc:  # reported to the coordinator as data, never lost in transport
        return failure(spec, exc)
    return {"ok": True, **info, "seconds": time.perf_counter() - t0}


_RESOLVED: dict = {}


def _resolved(payload: Payload):
    """The resolved plan, memoised per payload object (one map of the goal table per worker)."""
    key = id(payload)
    hit = _RESOLVED.get(key)
    if hit is None or hit[0] is not payload:
        _RESOLVED.clear()
        hit = (payload, payload.resolve())
        _RESOLVED[key] = hit
    return hit[1]


# ---- the local pool ---------------------------------------------------------------------------
_WORKER: dict = {}


def _watch_parent(parent: int, every: float = 0.2) -> None:
    while True:
        time.sleep(every)
        if os.getppid() != parent:
            os._exit(1)


def _init_worker(payload: Payload, parent: int) -> None:
    _WORKER["payload"] = payload
    threading.Thread(target=_watch_parent, args=(parent,), daemon=True).start()


def _pool_task(spec, folder, build_key):
    return run_shard(_WORKER["payload"], spec, folder, build_key)


class LocalRunner:
    """Run shard tasks in ``workers`` local processes.

    Parameters
    ----------
    workers : int
        Number of worker processes (at least 1).

    Examples
    --------
    >>> with LocalRunner(2) as runner:                                   # doctest: +SKIP
    ...     runner.start(payload)
    ...     for outcome in runner.run(specs, folder, key): ...
    """

    description = "local worker processes"

    def __init__(self, workers: int):
        if workers < 1:
            raise ValueError("workers must be at least 1")
        self.workers = int(workers)
        self.pool = None
        self.futures = []

    def start(self, payload: Payload) -> None:
        """Start the processes; each receives ``payload`` once."""
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        self.pool = ProcessPoolExecutor(self.workers, mp_context=multiprocessing.get_context("spawn"),
                                        initializer=_init_worker, initargs=(payload, os.getpid()))

    def run(self, specs, folder, build_key: str):
        """Submit every shard; yield task outcomes in completion order."""
        from concurrent.futures import as_completed
        from concurrent.futures.process import BrokenProcessPool

        by_future = {self.pool.submit(_pool_task, s, str(folder), build_key): s for s in specs}
        self.futures = list(by_future)
        for fut in as_completed(by_future):
            spec = by_future[fut]
            try:
                yield fut.result()
            except BrokenProcessPool as exc:
                yield failure(spec, RuntimeError(f"a worker process died ({exc})"))
            except Exception as exc:
                yield failure(spec, exc)

    def close(self) -> None:
        """Cancel queued shards, wait for running ones (they finish their shard files), stop."""
        if self.pool is not None:
            for f in self.futures:
                f.cancel()
            self.pool.shutdown(wait=True, cancel_futures=True)
            self.pool = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
