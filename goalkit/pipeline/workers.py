"""The shard task and the local worker pool.

Every worker gets the build's :class:`Payload` once (the plan and the opened log's index, no
log arrays): at process start for the local pool, by one ``scatter`` for Dask. A large goal
table is spilled by the coordinator to a file in the build folder and memory-mapped by each
worker, so it crosses no pipe and local workers share its pages. A task gets only a :class:`~goalkit.pipeline.shardfiles.ShardSpec`: it reads its
episodes from the logs itself, relabels them and writes a shard file. It never raises: it returns
``{"ok": True, ...}`` or ``{"ok": False, "error": {...}}``, so any failure reaches the
coordinator as plain data whatever the transport.

The local pool is a :class:`concurrent.futures.ProcessPoolExecutor` with the ``forkserver``
context (``spawn`` where there is none, or with ``GOALKIT_WORKER_START=spawn``): no fork of a
coordinator that holds open HDF5 files and threads, no Dask scheduler or ports for a one-machine
build. The fork server is one new interpreter that imports what a task needs
(:data:`WARM_MODULES`) once and then forks every worker from that state: with ``spawn`` each
worker started its own interpreter and imported the same (about 0.35 CPU seconds each, on the
cores the coordinator plans on). The server holds no file and runs no thread of ours; it is
stopped when the pool is closed. Each worker watches the process that started it and the
coordinator, and exits when either is gone (the fork server exits as soon as the coordinator
does), so a SIGKILLed build leaves no orphans working on.

The payload reaches local workers as a file, never through the start-up pipe. ``spawn`` (and the
fork server's) writes a new process's start-up data to a pipe whose read end the parent itself still holds until the
write ends; a payload larger than the pipe buffer (64 KiB on Linux) and a worker killed before
reading it all would block the coordinator in that write for ever. With only a path and a
SHA-256 on the pipe, a worker that dies at any moment (starting, loading the payload, mid-shard,
after writing) is seen by the pool as a broken pool and the build stops in one line.
"""

from __future__ import annotations

import hashlib
import importlib
import os
import pickle
import socket
import sys
import threading
import time
from dataclasses import dataclass, replace
from dataclasses import field as dataclass_field
from pathlib import Path

import numpy as np

from goalkit.errors import GoalkitError
from goalkit.heapkeep import keep_heap_here
from goalkit.logs.held import hold_logs
from goalkit.outputs import open_no_follow, write_own_file
from goalkit.pipeline.buildfolder import GOAL_TABLE_FILE, PAYLOAD_FILE
from goalkit.pipeline.chunk import relabel_chunk
from goalkit.pipeline.shardfiles import write_shard

#: Seconds between checks that every local worker process is still alive.
LIVENESS_SECONDS = 0.2
#: This machine's name: a task outcome says where its shard file was written.
HOST = socket.gethostname()
#: Arrays larger than this are spilled to a memory-mapped file instead of pickled.
SPILL_BYTES = 1 << 20
#: Environment variable choosing how local workers start (``spawn``; default: a fork server).
START_SWITCH = "GOALKIT_WORKER_START"
#: Modules a worker imports while the coordinator plans (what unpickling a payload and reading
#: and relabelling a shard would import on the first task).
WARM_MODULES = ("numpy", "h5py", "goalkit.pipeline.plan", "goalkit.pipeline.recipe", "goalkit.logs.grouped",
                "goalkit.logs.perfile")
#: Imported first by the fork server only (:mod:`goalkit.pipeline.serverenv`): the workers start
#: with one math-library thread each (:mod:`goalkit.threadenv`).
SERVER_ENV_MODULE = "goalkit.pipeline.serverenv"


def _save_npy(value, path) -> None:
    with os.fdopen(open_no_follow(path, os.O_WRONLY | os.O_TRUNC), "wb") as f:   # our new temporary file
        np.save(f, np.ascontiguousarray(value), allow_pickle=False)


def load_npy(path):
    """Memory-map a spilled array read-only."""
    return np.load(path, mmap_mode="r")


@dataclass(frozen=True)
class Payload:
    """What every worker needs besides its shard.

    Attributes
    ----------
    plan : BuildPlan
        The plan, with its spilled fields set to None.
    source : LogSource
        The coordinator's opened log: paths and per-episode index, no arrays; the worker opens
        the files itself when it reads its shard.
    files : dict
        Spilled field -> (file path, loader).
    """

    plan: object
    source: object
    files: dict = dataclass_field(default_factory=dict)

    def resolve(self):
        """The plan with its spilled fields loaded back (memory-mapped where possible)."""
        if not self.files:
            return self.plan
        return replace(self.plan, **{name: load(path) for name, (path, load) in self.files.items()})


def make_payload(plan, source, folder: Path, spill: bool = True) -> Payload:
    """Build the payload; with ``spill``, write a large goal table to ``folder`` once.

    The goal table (larger than :data:`SPILL_BYTES`) goes to :data:`GOAL_TABLE_FILE`, written under
    an exclusive temporary name and renamed (:func:`goalkit.outputs.write_own_file`); it lives in the
    build folder and goes with it.
    """
    table = getattr(plan, "goal_table", None)
    if not spill or table is None or table.nbytes <= SPILL_BYTES:
        return Payload(plan, source)
    path = Path(folder) / GOAL_TABLE_FILE
    write_own_file(path, lambda tmp: _save_npy(table, tmp), what="build folder file", by_path=True)
    return Payload(replace(plan, goal_table=None), source, {"goal_table": (str(path), load_npy)})


def failure(spec, exc: BaseException) -> dict:
    """A task outcome describing ``exc`` as plain data."""
    err = {"type": type(exc).__name__, "message": str(exc), "goalkit": isinstance(exc, GoalkitError),
           "os_error": isinstance(exc, OSError), "errno": getattr(exc, "errno", None)}
    if isinstance(exc, GoalkitError):
        err.update(message=exc.message, file=exc.file, key=exc.key, episode=exc.episode, step=exc.step)
    return {"ok": False, "index": spec.index, "error": err}


def lost_worker(spec, starting: bool = False) -> dict:
    """A task outcome for a shard whose worker process died (killed, out of memory).

    With ``starting`` (no worker ever finished its warm-up task), the message says that the
    workers died while starting and, when the build runs from a script, names the usual cause:
    each worker imports the script that started it, so a script without an
    ``if __name__ == "__main__":`` guard runs its build again inside every worker.
    """
    message = "a worker process died (killed, or out of memory?) while this shard was queued or running"
    if starting:
        message = "a worker process died while starting, before it could take a task"
        main = sys.modules.get("__main__")
        if getattr(main, "__file__", None):
            message += (f"; each worker imports the script that started the build "
                        f"({os.path.basename(main.__file__)}): call the build under "
                        f"`if __name__ == \"__main__\":` there")
    return {"ok": False, "index": spec.index,
            "error": {"type": "WorkerLost", "goalkit": False, "os_error": False, "message": message}}


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
        ``{"ok": True, "index", "rows", "sha256", "bytes", "host", "seconds", "cpu_seconds",
        "phases"}`` (the shard file's SHA-256 and size, the host it was written on; wall seconds
        of the task and of its read, relabel and write; CPU seconds of the task's thread) or
        ``{"ok": False, "index", "error"}``.
    """
    t0, c0 = time.perf_counter(), time.thread_time()
    try:
        plan = _resolved(payload)
        chunk = payload.source.read(spec.start, spec.stop)
        t1 = time.perf_counter()
        rows = relabel_chunk(plan, chunk, defer_gathers=True)   # gathered once, when written
        t2 = time.perf_counter()
        info = write_shard(folder, spec, build_key, rows, list(plan.columns))
    except Exception as exc:  # reported to the coordinator as data, never lost in transport
        return failure(spec, exc)
    t3 = time.perf_counter()
    return {"ok": True, **info, "host": HOST, "seconds": t3 - t0, "cpu_seconds": time.thread_time() - c0,
            "phases": {"read": t1 - t0, "relabel": t2 - t1, "write": t3 - t2}}


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
    """Exit when the coordinator ``parent`` is gone, or the process that started this one
    (the coordinator itself with ``spawn``, the fork server with ``forkserver``)."""
    started_by = os.getppid()
    while True:
        if os.getppid() != started_by or not _alive(parent):
            os._exit(1)
        time.sleep(every)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:          # exists, but not ours to signal
        return True
    return True


def start_method() -> str:
    """``"forkserver"`` where the platform has it, else ``"spawn"`` (``GOALKIT_WORKER_START=spawn``
    forces it).

    A process has one fork server. When one already runs (the caller's own, say for its data
    loaders), it is left alone, its preloaded modules and its life, and the workers are spawned.
    """
    import multiprocessing

    if (os.environ.get(START_SWITCH) == "spawn" or "forkserver" not in multiprocessing.get_all_start_methods()
            or _fork_server_running()):
        return "spawn"
    return "forkserver"


def _fork_server():
    from multiprocessing import forkserver

    return getattr(forkserver, "_forkserver", None)


def _fork_server_running() -> bool:
    """True when this process's fork server has been started and not stopped."""
    return getattr(_fork_server(), "_forkserver_pid", None) is not None


def _stop_fork_server(preload) -> None:
    """Stop the fork server this pool started (its workers have exited by then) and put back the
    modules the process had asked fork servers to preload before (``preload``)."""
    import multiprocessing

    stop = getattr(_fork_server(), "_stop", None)
    if stop is not None:
        try:
            stop()
        except (OSError, ChildProcessError):
            pass
    if preload is not None:
        multiprocessing.get_context("forkserver").set_forkserver_preload(preload)


def save_payload(payload: Payload, folder) -> tuple[str, str]:
    """Pickle ``payload`` to ``folder``/payload.pickle (exclusive temporary name, then rename).

    Returns
    -------
    (str, str)
        The file's path and the SHA-256 of its bytes (checked by each worker before unpickling).
    """
    data = pickle.dumps(payload, protocol=pickle.HIGHEST_PROTOCOL)
    path = Path(folder) / PAYLOAD_FILE
    write_own_file(path, lambda f: f.write(data), what="build folder file")
    return str(path), hashlib.sha256(data).hexdigest()


def _init_worker(parent: int) -> None:
    import signal

    # Ctrl-C reaches the whole process group: the coordinator stops the build and reports what
    # was kept; a worker finishes its shard file and is stopped by the coordinator. It was
    # started with SIGINT blocked (see LocalRunner.launch); one pending since then is discarded.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})
    threading.Thread(target=_watch_parent, args=(parent,), daemon=True).start()
    hold_logs()      # a local worker lives for one build: its shards' reads keep the log open
    keep_heap_here()  # and its shards reuse the memory the previous ones freed


def load_payload(payload_path: str, digest: str) -> Payload:
    """The payload of ``payload_path``, loaded once per worker process and kept by its digest.

    Raises
    ------
    RuntimeError
        When the file's bytes are not those the coordinator wrote (their SHA-256 differs).
    """
    if _WORKER.get("digest") != digest:
        data = Path(payload_path).read_bytes()
        if hashlib.sha256(data).hexdigest() != digest:  # not the file this build wrote: refuse it
            raise RuntimeError(f"{payload_path}: the payload file changed after the coordinator wrote it")
        _WORKER.clear()
        _WORKER.update(payload=pickle.loads(data), digest=digest)
    return _WORKER["payload"]


def _start_all_at_once(pool) -> None:
    """Make ``pool`` start all its processes on the first submit, before its manager thread runs.

    A ``spawn`` pool otherwise starts a process per submit while none is idle, on the submitting
    thread, while its manager thread may already be running. When a worker dies at that moment
    the manager thread, tearing the broken pool down, counts the processes while the submitting
    thread adds one; on Python 3.11 it then fails with "dictionary changed size during iteration"
    and prints a traceback. Starting them all before the thread exists (what the pool does itself
    for ``fork``) leaves no such window. Pools without the switch (older Pythons) keep their
    behaviour; :func:`_quiet_pool_threads` and the liveness check cover them.
    """
    if hasattr(pool, "_safe_to_dynamically_spawn_children"):
        pool._safe_to_dynamically_spawn_children = False


_HOOK_LOCK = threading.Lock()


def _quiet_pool_threads() -> None:
    """Keep a process pool's manager thread from printing a traceback when it fails.

    Installed once per process. An exception in the pool's own plumbing thread is not the user's
    to read: the pool's work then never completes, which :meth:`LocalRunner.dead_workers` sees,
    and the build stops with its one-line "a worker process died" message. Exceptions of every
    other thread go to the hook that was installed before.
    """
    from concurrent.futures import process as pool_module

    manager_type = getattr(pool_module, "_ExecutorManagerThread", None)
    with _HOOK_LOCK:
        if manager_type is None or getattr(threading.excepthook, "_goalkit_pool_quiet", False):
            return
        previous = threading.excepthook

        def hook(args):
            if isinstance(args.thread, manager_type):
                return
            previous(args)

        hook._goalkit_pool_quiet = True
        threading.excepthook = hook


def warm_up() -> int:
    """Import what a shard task needs (run on each worker while the coordinator plans); its pid."""
    for name in WARM_MODULES:
        importlib.import_module(name)
    return os.getpid()


def forget_payload() -> None:
    """Drop the payload this process loaded, and the plan resolved from it."""
    _WORKER.clear()
    _RESOLVED.clear()


def pool_task(payload_ref, spec, folder, build_key):
    """One shard (:func:`run_shard`) with the payload of the file ``payload_ref`` = (path, SHA-256),
    loaded on the first task (:func:`load_payload`): the task local workers and Dask run."""
    try:
        payload = load_payload(*payload_ref)
    except Exception as exc:  # reported as data, like any failure of the task
        return failure(spec, exc)
    return run_shard(payload, spec, folder, build_key)


class LocalRunner:
    """Run shard tasks in ``workers`` local processes.

    Parameters
    ----------
    workers : int
        Number of worker processes (at least 1).

    Examples
    --------
    >>> with LocalRunner(2) as runner:                                   # doctest: +SKIP
    ...     runner.start(payload, folder)
    ...     for outcome in runner.run(specs, folder, key): ...
    """

    description = "local worker processes"

    def __init__(self, workers: int):
        if workers < 1:
            raise ValueError("workers must be at least 1")
        self.workers = int(workers)
        self.pool = None
        self.futures = []
        self.warm = []
        self.payload_ref = None
        self.broken = False
        self.released = False
        self.manager = None
        self.method = None
        self.preload_before = None
        self.launched_at = None    # time.monotonic() when launch() started the processes
        self.starter = None        # the thread starting them (see launch)
        self.start_error = None    # what it raised, for the pool's next use
        self._launching = threading.Lock()   # launch() from several threads starts one pool

    def launch(self) -> None:
        """Start the worker processes now, without a payload (they import what a task needs).

        Called by the build before it plans, so that the processes start on the other cores
        while the coordinator plans. It does not wait for them: the processes are started on a
        thread of their own (``goalkit-pool-start``; with a fork server, the first start waits
        for the server to import :data:`WARM_MODULES`, about 0.15 s), and every later use of
        the pool (:meth:`submit`, :meth:`run`, :meth:`close`, ...) waits for that thread first.
        A failure to start them is raised by that later use. Idempotent; :meth:`start` calls it
        when the build did not. Thread-safe: a caller that finds the launch under way waits until
        the starting thread exists and has started, so that its next use can wait for it.
        """
        with self._launching:
            if self.pool is None:
                self._launch()

    def _launch(self) -> None:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        self.launched_at = time.monotonic()
        self.method = start_method()
        context = multiprocessing.get_context(self.method)
        if self.method == "forkserver":
            # imported once by the server; every worker is forked from that state (the
            # process's own preload list is put back when the pool closes)
            # (serverenv first: one math-library thread, set before numpy is imported)
            self.preload_before = list(getattr(_fork_server(), "_preload_modules", None) or [])
            context.set_forkserver_preload([SERVER_ENV_MODULE, *WARM_MODULES, __name__])
        self.pool = ProcessPoolExecutor(self.workers, mp_context=context,
                                        initializer=_init_worker, initargs=(os.getpid(),))
        _start_all_at_once(self.pool)
        _quiet_pool_threads()
        self.starter = threading.Thread(target=self._start_processes, name="goalkit-pool-start", daemon=True)
        self.starter.start()

    def _start_processes(self) -> None:
        """The starting thread: the first submits start every process (:func:`_start_all_at_once`);
        each worker takes one warm-up task (imports what a shard needs, unless its fork server
        preloaded them)."""
        import signal
        from concurrent.futures.process import BrokenProcessPool

        # the processes (and a fork server) inherit this thread's blocked SIGINT until
        # _init_worker ignores it, so a Ctrl-C while they start prints no traceback from a
        # half-started worker; the coordinator's own threads keep theirs
        signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
        try:
            for _ in range(self.workers):
                self.warm.append(self.pool.submit(warm_up))
        except (BrokenProcessPool, OSError, RuntimeError):
            # a worker died while the next was being started; run() reports it as a lost worker
            # (it cannot submit to the broken pool) and close() stops the rest
            self.broken = True
        except BaseException as exc:   # noqa: BLE001  raised again by the pool's next use
            self.start_error = exc

    def _join_starter(self) -> None:
        """Wait until the starting thread is done (at once when there is none)."""
        starter = self.starter
        if starter is not None:
            starter.join()
            self.starter = None

    def wait_started(self) -> None:
        """Wait until the starting thread is done; raise what it could not do."""
        self._join_starter()
        if self.start_error is not None:
            exc, self.start_error = self.start_error, None
            self.broken = True
            raise exc

    def ready(self) -> bool:
        """True when the pool has been launched and no worker is known to have died."""
        return self.pool is not None and not self.broken

    def submit(self, fn, *args):
        """Run ``fn(*args)`` on one of the workers; a :class:`concurrent.futures.Future`.

        ``fn`` must be importable by name (a module-level function). The hook by which work
        other than shards (planning a range of episodes, say) can run on the pool.
        """
        self.launch()
        self.wait_started()
        fut = self.pool.submit(fn, *args)
        self.futures.append(fut)
        return fut

    def start(self, payload: Payload, folder) -> None:
        """Hand ``payload`` to the workers: written once to ``folder``, loaded by each on its first shard.

        Raises
        ------
        OSError
            When the payload file cannot be written.
        """
        self.payload_ref = save_payload(payload, folder)
        self.launch()

    def run(self, specs, folder, build_key: str):
        """Submit every shard; yield task outcomes in completion order.

        Besides the pool's own detection of a dead worker (a broken pool), the worker processes
        are checked every :data:`LIVENESS_SECONDS` while shards are outstanding: the pool can miss
        a worker that dies just as it is started (its exit is not among the events the pool is
        waiting for) while the other workers wait on a queue lock the dead one held, and then
        nothing would ever complete.
        """
        from concurrent.futures import FIRST_COMPLETED, wait
        from concurrent.futures.process import BrokenProcessPool

        import signal

        self.wait_started()
        by_future = {}
        # every process was started by launch()'s thread; a pool without the switch of
        # _start_all_at_once (older Pythons) may still start one on submit: block SIGINT as
        # the starting thread does
        blocked = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
        broken_at = None
        try:
            for s in specs:
                try:
                    by_future[self.pool.submit(pool_task, self.payload_ref, s, str(folder), build_key)] = s
                except (BrokenProcessPool, OSError, RuntimeError):
                    # a worker died while the shards were being handed out: the pool is broken,
                    # or (Python 3.11) its wake-up pipe was closed under submit ("handle is
                    # closed"), or it shut down ("cannot schedule new futures")
                    broken_at = s
                    break
        finally:
            signal.pthread_sigmask(signal.SIG_SETMASK, blocked)
        if broken_at is not None:
            self.futures += list(by_future)
            self.broken = True
            yield self._lost(broken_at)
            return
        self.futures += list(by_future)
        pending = set(by_future)
        while pending:
            done, pending = wait(pending, timeout=LIVENESS_SECONDS, return_when=FIRST_COMPLETED)
            for fut in sorted(done, key=lambda f: by_future[f].index):
                spec = by_future[fut]
                try:
                    yield fut.result()
                except BrokenProcessPool:
                    self.broken = True
                    yield self._lost(spec)
                except Exception as exc:
                    if not isinstance(exc, GoalkitError) and self.dead_workers():
                        # the pool's own plumbing failing after a worker died (e.g. Python 3.11's
                        # "handle is closed"): the cause is the dead worker, say so
                        self.broken = True
                        yield self._lost(spec)
                    else:
                        yield failure(spec, exc)
            if pending and not done and self.dead_workers():
                self.broken = True
                yield self._lost(min((by_future[f] for f in pending), key=lambda sp: sp.index))
                return

    def _lost(self, spec) -> dict:
        """:func:`lost_worker` for ``spec``, saying whether no worker had started yet."""
        started = any(f.done() and not f.cancelled() and f.exception() is None for f in self.warm)
        return lost_worker(spec, starting=not started)

    def dead_workers(self) -> list:
        """Process ids of pool workers that have exited (workers only exit at shutdown).

        A pool whose own manager thread has died (it can no longer hand out work or collect
        results) counts as having lost a worker too: ``[-1]`` when no process is seen dead.
        """
        self._join_starter()
        procs = getattr(self.pool, "_processes", None) or {}  # the pool's own map of its processes
        dead = [pid for pid, proc in list(procs.items()) if proc.exitcode is not None]
        manager = getattr(self.pool, "_executor_manager_thread", None)
        if not dead and manager is not None and not manager.is_alive() and not getattr(self.pool, "_shutdown_thread", False):
            dead = [-1]
        return dead

    def close(self) -> None:
        """Cancel queued shards, wait for running ones (they finish their shard files), stop.

        When a worker has died, the others are terminated first: the pool's queues may be left
        locked by the dead process, and waiting on them could take for ever. A pool that was
        given no shard (the build stopped while planning) is terminated too: its workers have
        nothing to finish.
        """
        self._join_starter()
        if self.pool is not None:
            for f in self.futures:
                f.cancel()
            idle = self.payload_ref is None
            if not self.released and (self.broken or idle or self.dead_workers()):
                for proc in list((getattr(self.pool, "_processes", None) or {}).values()):
                    if proc.exitcode is None:
                        proc.terminate()
            self.pool.shutdown(wait=True, cancel_futures=True)
            self.pool = None
            if self.manager is not None:       # released: its processes are joined by then
                self.manager.join()
                self.manager = None
            if self.method == "forkserver":
                _stop_fork_server(self.preload_before)

    def release(self) -> None:
        """Every shard has been computed: let the worker processes exit now, without waiting.

        Called by the sharded producer as the last shard's outcome arrives, so that the workers'
        exit (interpreter shutdown, about 0.1 s each) overlaps the coordinator's writing of the
        last rows instead of following it; :meth:`close` then only joins them.
        """
        self._join_starter()
        if self.pool is not None and not self.released:
            self.released = True
            # shutdown(wait=False) drops the pool's reference to its manager thread, which joins
            # the processes as they exit: keep it, close() waits for it
            self.manager = getattr(self.pool, "_executor_manager_thread", None)
            self.pool.shutdown(wait=False)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
