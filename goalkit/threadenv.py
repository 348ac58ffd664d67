"""One math-library thread in goalkit's own helper processes.

numpy's OpenBLAS starts a thread per CPU when numpy is imported, and those threads spin while
they wait for work: on a 2-core machine importing numpy costs about 0.26 CPU seconds instead of
0.15, the difference taken from the core the build is using. goalkit's helper processes (the
spare planning and reading helper, the local workers' fork server and so the workers) do no
multi-threaded linear algebra, and several of them share the machine's cores with the build
itself, so they start with one thread per math library, as worker processes usually are. A
variable the user has set is kept as it is. The user's own process is never changed.

This module imports nothing but :mod:`os`: the workers' fork server imports it (through
:mod:`goalkit.pipeline.serverenv`) before numpy.
"""

from __future__ import annotations

import os

#: Thread-count variables of the math libraries numpy may use (OpenBLAS, OpenMP, MKL).
THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def one_thread_environ(environ) -> dict:
    """A copy of ``environ`` with every :data:`THREAD_VARIABLES` entry the user has not set at 1."""
    env = dict(environ)
    for name in THREAD_VARIABLES:
        env.setdefault(name, "1")
    return env


def limit_this_process() -> None:
    """Set the unset :data:`THREAD_VARIABLES` to 1 in this process's environment (before numpy
    is imported, or they have no effect)."""
    for name in THREAD_VARIABLES:
        os.environ.setdefault(name, "1")
