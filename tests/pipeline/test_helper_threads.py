"""goalkit's own helper processes start with one math-library thread (goalkit/threadenv.py).

Reference: the thread-count variables OpenBLAS, OpenMP and MKL document (``OPENBLAS_NUM_THREADS``,
``OMP_NUM_THREADS``, ``MKL_NUM_THREADS``), read in the helper process itself; and the number of
threads the helper process runs after importing numpy (``/proc/PID/status``), against a plain
interpreter started by the test with the same environment otherwise. A variable the user set is
kept; the user's own process is never changed.
"""

from __future__ import annotations

import importlib
import os
import subprocess
import sys

import pytest

from goalkit.logs import spare
from goalkit.pipeline.workers import LocalRunner, start_method
from goalkit.threadenv import THREAD_VARIABLES, one_thread_environ


def threads_of(pid: int) -> int:
    """Threads process ``pid`` runs now (``/proc/PID/status``)."""
    with open(f"/proc/{pid}/status") as f:
        return int(next(line.split()[1] for line in f if line.startswith("Threads:")))


def plain_numpy_threads() -> int:
    """Threads of a plain interpreter, with this environment, after importing numpy."""
    out = subprocess.run([sys.executable, "-c", "import numpy, sys; "
                          "print(open('/proc/self/status').read().split('Threads:')[1].split()[0])"],
                         capture_output=True, text=True, check=True)
    return int(out.stdout)


def _ask_spare(call, *args, threads=False):
    """``call(*args)`` answered by a new spare helper (and its thread count after numpy, when asked)."""
    helper = spare.Spare.start()
    assert helper is not None
    try:
        assert helper.send({"call": call, "each": [args, ("numpy",)]}) if threads else \
            helper.send({"call": call, "each": [args]})
        answer = helper.receive()
        if not threads:
            return answer
        helper.receive()                 # numpy imported there (a module is not sent back)
        return answer, threads_of(helper.proc.pid)
    finally:
        helper.close()


def test_unset_variables_become_one_and_set_ones_are_kept():
    env = one_thread_environ({"OMP_NUM_THREADS": "4", "PATH": "/bin"})
    assert env["OMP_NUM_THREADS"] == "4" and env["PATH"] == "/bin"
    assert env["OPENBLAS_NUM_THREADS"] == "1" and env["MKL_NUM_THREADS"] == "1"


@pytest.fixture
def unset(monkeypatch):
    for name in THREAD_VARIABLES:
        monkeypatch.delenv(name, raising=False)


def test_the_spare_helper_runs_one_blas_thread(unset):
    value, threads = _ask_spare(importlib.import_module, "os", threads=True)
    assert threads == 1                  # its request loop only; numpy started no thread there
    assert _ask_spare(os.getenv, "OPENBLAS_NUM_THREADS") == "1"
    assert "OPENBLAS_NUM_THREADS" not in os.environ            # the user's process is unchanged
    if (os.cpu_count() or 1) > 1:
        assert plain_numpy_threads() > 1  # what it would have run: OpenBLAS adds a thread per CPU


def test_a_variable_the_user_set_reaches_the_spare_as_set(monkeypatch):
    monkeypatch.setenv("OPENBLAS_NUM_THREADS", "3")
    assert _ask_spare(os.getenv, "OPENBLAS_NUM_THREADS") == "3"


@pytest.mark.skipif(start_method() != "forkserver", reason="workers start from a fork server here")
def test_local_workers_run_one_blas_thread_and_the_coordinator_is_unchanged(unset):
    with LocalRunner(1) as runner:
        runner.launch()
        assert runner.submit(os.getenv, "OPENBLAS_NUM_THREADS").result(timeout=60) == "1"
        assert runner.submit(os.getenv, "OMP_NUM_THREADS").result(timeout=60) == "1"
        pid = runner.submit(os.getpid).result(timeout=60)
        assert threads_of(pid) == 2          # its task loop and its liveness watch, no BLAS threads
    for name in THREAD_VARIABLES:
        assert name not in os.environ


@pytest.mark.skipif(start_method() != "forkserver", reason="workers start from a fork server here")
def test_a_variable_the_user_set_reaches_the_workers_as_set(monkeypatch):
    monkeypatch.setenv("OMP_NUM_THREADS", "2")
    with LocalRunner(1) as runner:
        assert runner.submit(os.getenv, "OMP_NUM_THREADS").result(timeout=60) == "2"
        assert runner.submit(os.getenv, "OPENBLAS_NUM_THREADS").result(timeout=60) in ("1", os.environ.get(
            "OPENBLAS_NUM_THREADS"))
