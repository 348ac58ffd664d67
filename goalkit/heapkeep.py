"""Freed memory kept for reuse in the processes that run goalkit's shard tasks (glibc only).

glibc's ``malloc`` serves a block of ``M_MMAP_THRESHOLD`` bytes or more (128 KiB at start) with a
fresh mapping, unmapped again when it is freed, and gives the top of a heap back to the system
once more than ``M_TRIM_THRESHOLD`` bytes are free there. By default it raises both thresholds as
it sees large blocks freed (its "dynamic thresholds", mallopt(3)), so a process that allocates and
frees arrays of the same sizes over and over soon reuses its memory. Setting either threshold
explicitly turns that off for the life of the process, and Dask's nanny does so for every worker
it starts (``MALLOC_TRIM_THRESHOLD_=65536`` in ``distributed.nanny.pre-spawn-environ``): each array
of 128 KiB or more is then mapped afresh, and the kernel faults in and zeroes every page of it
again. A shard task allocates and frees about 110 MB of such arrays per 20,000 transitions of
the demo recipe: on a Dask worker, a 200k-transition build took 145,000 page faults per worker,
against 13,000 with the thresholds below (0.15-0.3 CPU seconds of system time per worker on the
2-core machine the benchmarks run on).

* :func:`hold_heap` / :func:`release_heap`: a Dask worker, for the time of a build
  (:mod:`goalkit.pipeline.dask_build`). Applied only when the worker's thresholds are known, so
  that they can be put back exactly: ``MALLOC_TRIM_THRESHOLD_`` set in its environment (as
  Dask's nanny does) and no other malloc setting. Releasing puts back the trim threshold from
  the environment and the fixed 128 KiB mmap threshold that setting implies, then returns the
  free memory to the system (``malloc_trim``, and :func:`trim_thread_heap` on the threads that
  ran the shards).
* :func:`keep_heap_here`: goalkit's own helper processes (the local workers' fork server, and
  so every local worker; the spare helper process), for their whole life, when the user has set
  no malloc variable.

``GOALKIT_KEEP_HEAP=0`` turns both off. Outside glibc (musl, macOS) nothing is done. The user's
own process is never changed. This module imports nothing but the standard library: the fork
server imports it (through :mod:`goalkit.pipeline.serverenv`) before numpy.
"""

from __future__ import annotations

import contextlib
import ctypes
import functools
import os
import threading

#: ``mallopt`` parameters (glibc's ``malloc.h``).
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
#: Blocks below this come from the heaps while the heap is kept: glibc's largest allowed
#: ``M_MMAP_THRESHOLD`` on 64-bit systems (half its 64 MiB per-thread heap), the ceiling its own
#: dynamic threshold rises to.
KEPT_MMAP_THRESHOLD = 32 << 20
#: Free memory at the top of a heap kept up to this much: twice the mmap threshold, as glibc's
#: dynamic thresholds keep it.
KEPT_TRIM_THRESHOLD = 64 << 20
#: A block taken and freed so that glibc trims the calling thread's heap (:func:`trim_thread_heap`).
TOP_PROBE_BYTES = 256 << 10
#: glibc's ``M_MMAP_THRESHOLD`` at start, which stays fixed once a trim threshold is set.
DEFAULT_MMAP_THRESHOLD = 128 << 10
#: Environment variable that turns keeping the heap off (``GOALKIT_KEEP_HEAP=0``).
SWITCH = "GOALKIT_KEEP_HEAP"
#: Environment variables by which glibc's malloc is configured (``GLIBC_TUNABLES`` only when it
#: names a ``glibc.malloc.`` tunable).
MALLOC_VARIABLES = ("MALLOC_TRIM_THRESHOLD_", "MALLOC_MMAP_THRESHOLD_", "MALLOC_TOP_PAD_", "MALLOC_MMAP_MAX_",
                    "MALLOC_ARENA_MAX", "MALLOC_ARENA_TEST")

_lock = threading.Lock()
_restore: list = []          # the trim threshold to put back while a heap is held


@functools.cache
def _libc():
    """glibc's C library of this process, or None (another C library, or none found); looked up
    once."""
    try:
        if not (os.confstr("CS_GNU_LIBC_VERSION") or "").startswith("glibc"):
            return None
        libc = ctypes.CDLL(None)
        libc.mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
        libc.malloc_trim.argtypes = (ctypes.c_size_t,)
        libc.malloc.argtypes = (ctypes.c_size_t,)
        libc.malloc.restype = ctypes.c_void_p
        libc.free.argtypes = (ctypes.c_void_p,)
        return libc
    except (AttributeError, OSError, ValueError):
        return None


def _switched_off(environ) -> bool:
    return environ.get(SWITCH, "1").strip().lower() in ("0", "false", "no", "off")


def _user_settings(environ, allowed=()) -> bool:
    """True when ``environ`` configures glibc's malloc other than through ``allowed``."""
    if "glibc.malloc." in environ.get("GLIBC_TUNABLES", ""):
        return True
    return any(name in environ for name in MALLOC_VARIABLES if name not in allowed)


def _set(libc, mmap_threshold: int, trim_threshold: int) -> bool:
    return bool(libc.mallopt(M_MMAP_THRESHOLD, mmap_threshold)) and bool(libc.mallopt(M_TRIM_THRESHOLD, trim_threshold))


def keep_heap_here(environ=None) -> bool:
    """Keep freed memory for reuse in this process, for its whole life; True when done.

    For goalkit's own helper processes. Nothing is done when the environment configures glibc's
    malloc (the user's setting stands), when ``GOALKIT_KEEP_HEAP=0``, or outside glibc.
    """
    environ = os.environ if environ is None else environ
    if _switched_off(environ) or _user_settings(environ):
        return False
    libc = _libc()
    return libc is not None and _set(libc, KEPT_MMAP_THRESHOLD, KEPT_TRIM_THRESHOLD)


def hold_heap(environ=None) -> bool:
    """Keep freed memory for reuse until :func:`release_heap`; True when it is now held.

    For a Dask worker during a build. Done only when the thresholds in force can be put back
    exactly: ``MALLOC_TRIM_THRESHOLD_`` is set to a whole number (Dask's nanny sets 65536) and no
    other malloc variable or tunable is. Holding twice holds once.
    """
    environ = os.environ if environ is None else environ
    with _lock:
        if _restore:
            return True
        if _switched_off(environ) or _user_settings(environ, allowed=("MALLOC_TRIM_THRESHOLD_",)):
            return False
        try:
            trim = int(environ["MALLOC_TRIM_THRESHOLD_"], 0)
        except (KeyError, ValueError):
            return False
        libc = _libc()
        if trim < 0 or libc is None:
            return False
        if not _set(libc, KEPT_MMAP_THRESHOLD, KEPT_TRIM_THRESHOLD):
            _set(libc, DEFAULT_MMAP_THRESHOLD, trim)
            return False
        _restore.append(trim)
        return True


def release_heap() -> bool:
    """Put back the thresholds :func:`hold_heap` changed and return the free memory to the
    system; True when a held heap was released."""
    with _lock:
        if not _restore:
            return False
        trim = _restore.pop()
        libc = _libc()
        if libc is None:
            return False
        _set(libc, DEFAULT_MMAP_THRESHOLD, trim)
        with contextlib.suppress(Exception):
            libc.malloc_trim(0)
        _trim_top(libc)
        return True


def trim_thread_heap() -> bool:
    """Give back the free top of the calling thread's own heap, unless the heap is held; True
    when asked of glibc.

    ``malloc_trim`` (called by :func:`release_heap`) gives back the main heap and the free
    blocks inside every heap, but not the free top of a thread's own heap, up to the trim
    threshold that was in force (:data:`KEPT_TRIM_THRESHOLD`) until that thread next frees a
    large block. A block taken from that top and freed again makes glibc trim it now: run this
    on the threads that did the work (a Dask worker's task threads) after :func:`release_heap`.
    """
    with _lock:
        if _restore:
            return False
        libc = _libc()
        return libc is not None and _trim_top(libc)


def _trim_top(libc) -> bool:
    with contextlib.suppress(Exception):
        libc.free(libc.malloc(TOP_PROBE_BYTES))
        return True
    return False


def heap_held() -> bool:
    """True while :func:`hold_heap` holds this process's heap."""
    return bool(_restore)
