"""Peak resident memory of this process image, for the benchmarks' case processes.

``getrusage(RUSAGE_SELF).ru_maxrss`` is the wrong figure for a process started by another:
Linux keeps the high-water mark across ``execve`` (getrusage(2): the maximum resident set size
"used"; the kernel saves the old image's peak at exec), so a case process started by a parent
that had just generated large logs reports the parent's peak. ``VmHWM`` in ``/proc/self/status``
(proc(5)) is the peak of the current image only.
"""

from __future__ import annotations


def peak_rss_mb() -> float:
    """Peak resident set size of this process image in MiB (``VmHWM``, proc(5))."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024     # the kernel reports kB
    raise RuntimeError("no VmHWM line in /proc/self/status")
