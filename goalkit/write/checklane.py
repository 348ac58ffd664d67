"""A second thread for verify: tasks handed over in order and run one at a time, in that order.

verify's replay reads each chunk's stored rows once and checks them on the main thread. The
audit of those rows and their manifest checksums need the same rows but nothing the replay's
checks compute, so verify hands them to a :class:`CheckLane`: one thread runs them in the
order they were handed over, so the audit and the checksums see exactly the sequence of rows
they would see on the main thread, and their results are the same bit for bit. numpy and
hashlib release the GIL on large arrays, so the two threads share the machine's cores.

The queue is short (``depth`` tasks): the main thread waits rather than holding the rows of
many chunks in memory. The first exception a task raises is raised again in the caller's
thread by the next :meth:`CheckLane.submit` or by :meth:`CheckLane.drain`; the tasks after it
are skipped.
"""

from __future__ import annotations

import queue
import threading

#: Tasks waiting at most (each holds the stored rows of one split of one chunk).
DEPTH = 1


class CheckLane:
    """Run ``fn(*args)`` tasks on one thread, in the order of :meth:`submit`.

    Parameters
    ----------
    depth : int
        Tasks that may wait; :meth:`submit` blocks while that many do.
    name : str
        The thread's name.
    """

    def __init__(self, depth: int = DEPTH, name: str = "goalkit-verify-lane"):
        self._queue = queue.Queue(maxsize=max(1, int(depth)))
        self._error = None
        self._stop = False
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while True:
            task = self._queue.get()
            try:
                if task is None:
                    return
                if self._error is None and not self._stop:
                    fn, args = task
                    fn(*args)
            except BaseException as exc:   # noqa: BLE001  raised again in the caller's thread
                self._error = exc
            finally:
                self._queue.task_done()

    def _raise(self) -> None:
        if self._error is not None:
            error, self._error = self._error, None
            self._stop = True
            raise error

    def submit(self, fn, *args) -> None:
        """Hand over ``fn(*args)``; raises the exception of an earlier task, if one failed."""
        self._raise()
        if self._stop:
            raise RuntimeError("this lane was closed")
        self._queue.put((fn, args))

    def drain(self) -> None:
        """Wait until every task handed over has run; raise the first exception one raised."""
        self._queue.join()
        self._raise()

    def failed_before(self) -> BaseException | None:
        """Wait for the tasks handed over so far; the exception one raised (None if none did).

        The caller uses it when it fails itself: a task handed over before its failure came
        first in the work's order, so its exception is the one to raise.
        """
        self._queue.join()
        error, self._error = self._error, None
        return error

    def close(self) -> None:
        """Stop the thread: tasks still waiting are skipped; the running one finishes."""
        self._stop = True
        if self._thread.is_alive():
            self._queue.put(None)
            self._thread.join()
