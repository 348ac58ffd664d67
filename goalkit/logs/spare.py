"""A spare helper process, started early, for the helpers of one build in turn.

Starting a helper interpreter (Python, numpy, h5py, goalkit's readers) costs about 0.2 s: paid
when the helper is first wanted, it delays the build. So a build on large logs with a second CPU
opens a :func:`scope` first thing, which starts one spare (``python -m goalkit.logs.spare``)
while the build loads its recipe; then the grouped log's planning helper
(:mod:`goalkit.logs.planspawn`) and afterwards the build's chunk reader
(:mod:`goalkit.pipeline.readproc`) :func:`take` it in turn, find it ready, and :func:`give_back`
it when they are done with it. Leaving the scope stops a spare nobody took. Outside a scope,
:func:`take` starts a fresh process (the helpers work the same, only later).

The spare serves requests one after another: a length-prefixed pickle on its stdin, answered by
length-prefixed pickles on its stdout, one per call (see :func:`serve`): the planning helper asks
for :func:`goalkit.logs.planhelper.plan_part` of its groups, the chunk reader for
``source.read`` of each chunk.

Every answer is ``("ok", value)`` or ``("failed", None)``; the caller does failed work itself, so a
spare only ever saves time. It exits at the end of its stdin, so it never outlives its build.
``GOALKIT_SPARE=0`` turns the early start off.
"""

from __future__ import annotations

import os
import pickle
import struct
import subprocess
import sys
import threading
import time

from goalkit.threadenv import one_thread_environ

#: Logs smaller than this in total start no spare (their helpers, if any, start when wanted).
WARM_BYTES = 8 << 20
#: Environment variable that turns the early start off (``GOALKIT_SPARE=0``).
SWITCH = "GOALKIT_SPARE"
_LENGTH = struct.Struct("<Q")
#: Requests larger than this are written on a side thread (``goalkit-spare-send``): a pipe holds
#: 64 KiB, and a spare still starting reads nothing, so a larger write (the planning helper's
#: group paths: 64 KiB at 4,250 groups) would hold the caller until the spare is up.
DIRECT_BYTES = 32 << 10
_lock = threading.Lock()
_slot: list = []
_scopes = [0]


def cpus() -> int:
    """CPUs this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def _python_path() -> str:
    """PYTHONPATH for a helper: the folder this goalkit is imported from, then the caller's."""
    here = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    return os.pathsep.join(p for p in (here, os.environ.get("PYTHONPATH", "")) if p)


class Spare:
    """One helper process; :meth:`send` a request, :meth:`receive` its answers."""

    def __init__(self, proc):
        self.proc = proc
        self.started = time.monotonic()
        self._sending = None            # (thread, [error]) of a request still being written

    @classmethod
    def start(cls):
        """A new helper process, or None when it cannot be started."""
        try:
            proc = subprocess.Popen([sys.executable, "-m", "goalkit.logs.spare"], stdin=subprocess.PIPE,
                                    stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                                    env={**one_thread_environ(os.environ), "PYTHONPATH": _python_path()})
        except (OSError, ValueError):
            return None
        return cls(proc)

    @property
    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def send(self, request: dict) -> bool:
        """Write one request; False (and the process stopped) when it cannot be written.

        A request over :data:`DIRECT_BYTES` is written on a side thread, so that the caller goes
        on while the spare is still starting; :meth:`receive` waits for that write first.
        """
        if not self._sent():
            self.close()
            return False
        try:
            data = pickle.dumps(request, protocol=pickle.HIGHEST_PROTOCOL)
            stream = self.proc.stdin
            if len(data) <= DIRECT_BYTES:
                _send_bytes(stream, _LENGTH.pack(len(data)) + data, None)
                return True
        except (OSError, ValueError, AttributeError, pickle.PicklingError):
            self.close()
            return False
        failed: list = []
        thread = threading.Thread(target=_send_bytes, args=(stream, _LENGTH.pack(len(data)) + data, failed),
                                  name="goalkit-spare-send", daemon=True)
        self._sending = (thread, failed)
        thread.start()
        return True

    def _sent(self) -> bool:
        """Wait for a request still being written; False when its write failed."""
        sending, self._sending = self._sending, None
        if sending is None:
            return True
        sending[0].join()
        return not sending[1]

    def receive(self):
        """The next answer's value; None when it failed there or the process is gone (then stopped)."""
        if not self._sent():
            self.close()
            return None
        try:
            head = self.proc.stdout.read(_LENGTH.size)
            if len(head) == _LENGTH.size:
                (size,) = _LENGTH.unpack(head)
                data = self.proc.stdout.read(size)
                if len(data) == size:
                    status, value = pickle.loads(data)
                    if status == "ok":
                        return value
                    return None              # that piece failed there; the process goes on
        except Exception:                    # noqa: BLE001  a broken helper: stop it
            pass
        self.close()
        return None

    def close(self) -> None:
        """Stop the process (idempotent)."""
        proc, self.proc = self.proc, None
        if proc is None:
            return
        try:
            proc.kill()
        except OSError:
            pass
        sending, self._sending = self._sending, None
        if sending is not None:
            sending[0].join(timeout=10)          # the write fails once the process is gone
        for stream in (proc.stdin, proc.stdout):
            try:
                if stream is not None:
                    stream.close()
            except OSError:
                pass
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            pass


def _send_bytes(stream, data: bytes, failed) -> None:
    """Write and flush ``data``; with a list ``failed`` (on a side thread), an error is appended
    to it instead of raised."""
    try:
        stream.write(data)
        stream.flush()
    except (OSError, ValueError) as exc:
        if failed is None:
            raise
        failed.append(exc)


def wanted(paths) -> bool:
    """True when logs at ``paths`` (files, or folders of files) are worth an early spare."""
    if cpus() < 2 or os.environ.get(SWITCH, "1") == "0":
        return False
    total = 0
    for p in paths:
        try:
            if os.path.isdir(p):
                with os.scandir(p) as it:
                    total += sum(e.stat(follow_symlinks=False).st_size for e in it
                                 if e.is_file(follow_symlinks=False))
            else:
                total += os.stat(p).st_size
        except OSError:
            continue
        if total >= WARM_BYTES:
            return True
    return False


class scope:
    """``with scope(paths):`` -- keep helpers for the work inside; with ``early``, start a spare
    now (when the logs at ``paths`` are large enough and a second CPU is free); stop a spare
    nobody took at the end."""

    def __init__(self, paths=(), early: bool = True):
        self.paths = list(paths) if early else []

    def __enter__(self):
        with _lock:
            _scopes[0] += 1
        prestart(self.paths)
        return self

    def __exit__(self, *exc):
        with _lock:
            _scopes[0] -= 1
            left = list(_slot) if _scopes[0] == 0 else []
            if _scopes[0] == 0:
                _slot.clear()
        for spare in left:
            spare.close()
        return False


def prestart(paths) -> None:
    """Inside a scope, start a spare now unless one waits (for logs at ``paths``, see
    :func:`wanted`): a reader that will want helpers calls it as it opens its logs."""
    with _lock:
        start = _scopes[0] > 0 and not _slot and wanted(paths)
    if start:
        spare = Spare.start()
        if spare is not None:
            give_back(spare)


def take():
    """The waiting spare, else a freshly started process (None when none can be started)."""
    with _lock:
        spare = _slot.pop() if _slot else None
    if spare is not None and spare.alive:
        return spare
    if spare is not None:
        spare.close()
    return Spare.start()


def give_back(spare) -> None:
    """Hand a spare that answered everything it was asked back for the next helper (inside a
    scope), else stop it."""
    if spare is None:
        return
    with _lock:
        keep = _scopes[0] > 0 and not _slot and spare.alive
        if keep:
            _slot.append(spare)
    if not keep:
        spare.close()


def waiting_for():
    """Seconds since the waiting spare was started, or None when no spare is waiting."""
    with _lock:
        return time.monotonic() - _slot[0].started if _slot else None


def _write(stdout, status, value) -> None:
    try:
        data = pickle.dumps((status, value), protocol=pickle.HIGHEST_PROTOCOL)
    except Exception:                        # noqa: BLE001  an answer that does not pickle
        data = pickle.dumps(("failed", None))
    stdout.write(_LENGTH.pack(len(data)))
    stdout.write(data)
    stdout.flush()


def serve(stdin, stdout) -> None:
    """The spare process: answer requests until the end of stdin.

    A request is ``{"call": f, "each": [args, ...]}`` (``f`` pickled by reference: a function
    of an importable module, or a bound method of a picklable object); the answers are
    ``f(*args)`` for each ``args``, in order.
    """
    while True:
        head = stdin.read(_LENGTH.size)
        if len(head) < _LENGTH.size:
            return
        (size,) = _LENGTH.unpack(head)
        for status, value in answers(pickle.loads(stdin.read(size))):
            _write(stdout, status, value)


def answers(request: dict):
    """Yield ``("ok", f(*args))`` or ``("failed", None)`` for each ``args`` of ``request``
    (``{"call": f, "each": [args, ...]}``), in order: what a spare answers, wherever it runs."""
    call = request["call"]
    for args in request["each"]:
        try:
            value = call(*args)
        except Exception:                    # noqa: BLE001  the caller does this piece itself
            yield "failed", None
        else:
            yield "ok", value


if __name__ == "__main__":
    try:
        from goalkit.heapkeep import keep_heap_here
        from goalkit.logs.held import hold_logs

        hold_logs()            # this process lives for one build: its reads keep the log open
        keep_heap_here()       # and reuses the memory its earlier reads freed
        serve(sys.stdin.buffer, sys.stdout.buffer)
    except BaseException:                    # noqa: BLE001  the callers do what is left themselves
        sys.exit(1)
