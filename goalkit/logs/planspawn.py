"""A second process that plans the last part of a grouped log's episode groups.

Planning a grouped log opens every dataset of every episode group, one HDF5 call after another:
about a quarter of a millisecond per group, serial in one process (h5py's lock). With many
groups and a second CPU, :class:`~goalkit.logs.grouped.GroupedSource` starts one helper
process (``python -m goalkit.logs.planhelper``: no fork of a process holding HDF5 handles and
threads, no re-import of the user's main module) for the last part of the groups while it
plans the first part itself. The request travels on the helper's stdin and the metas come back
on its stdout, pickled; anything unexpected (no second CPU, the helper cannot start, fails, or
answers for other groups) and the caller plans those groups itself: the helper only ever saves
time, it never changes the result.
"""

from __future__ import annotations

import hashlib
import os
import pickle
import subprocess
import sys
import threading

#: Fewest episode groups worth a helper process (below, its start-up costs more than it saves).
MIN_GROUPS = 8_000
#: Start-up of the helper (interpreter, numpy, h5py) and planning cost per group, in seconds
#: (measured on the 2-core reference machine; they set how the groups are shared).
STARTUP_SECONDS = 0.8
SECONDS_PER_GROUP = 250e-6
#: Environment variable that turns the helper off (``GOALKIT_PLAN_HELPER=0``).
SWITCH = "GOALKIT_PLAN_HELPER"


def cpus() -> int:
    """CPUs this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def helper_split(total: int, skip_bad_episodes: bool = False) -> int | None:
    """First group the helper plans, or None when no helper is worth starting.

    The caller plans ``0 .. split - 1`` and the helper ``split .. total - 1``, shared so that
    both finish together: the caller's part is larger by the helper's start-up.
    """
    if total < MIN_GROUPS or skip_bad_episodes or cpus() < 2 or os.environ.get(SWITCH, "1") == "0":
        return None
    serial = total * SECONDS_PER_GROUP
    mine = min(0.9, (1 + STARTUP_SECONDS / serial) / 2)
    return int(total * mine)


def groups_digest(groups) -> str:
    """SHA-256 of the group paths, so the helper answers for the very same groups."""
    return hashlib.sha256("\n".join(groups).encode("utf-8")).hexdigest()


def start_helper(source, split: int):
    """Start the helper for groups ``split ..`` of ``source`` (a GroupedSource); None on failure."""
    request = {"path": source.path, "layout": source.layout, "start": split, "total": len(source.groups),
               "digest": groups_digest(source.groups)}
    try:
        payload = pickle.dumps(request, protocol=pickle.HIGHEST_PROTOCOL)
        proc = subprocess.Popen([sys.executable, "-m", "goalkit.logs.planhelper"], stdin=subprocess.PIPE,
                                stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                                env={**os.environ, "PYTHONPATH": _python_path()})
    except (OSError, ValueError, pickle.PicklingError):
        return None
    out: dict = {}

    def talk():                       # on a thread: the pipes' buffers never block the caller
        try:
            out["stdout"], _ = proc.communicate(payload)
        except (OSError, ValueError):
            out["stdout"] = b""

    thread = threading.Thread(target=talk, name="goalkit-plan-helper", daemon=True)
    thread.start()
    return proc, thread, out


def _python_path() -> str:
    """PYTHONPATH for the helper: the folder this goalkit is imported from, then the caller's."""
    here = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    return os.pathsep.join(p for p in (here, os.environ.get("PYTHONPATH", "")) if p)


def stop_helper(helper) -> None:
    """Stop a helper whose answer is no longer wanted (the caller failed or was interrupted)."""
    proc, thread, _ = helper
    try:
        proc.kill()
    except OSError:
        pass
    thread.join(timeout=5)


def finish_helper(helper) -> dict | None:
    """The helper's answer (``metas``, ``owners``, ``key_dtypes``), or None if it has none."""
    proc, thread, out = helper
    thread.join()
    if proc.returncode != 0:
        return None
    try:
        found = pickle.loads(out.get("stdout") or b"")
    except Exception:                  # noqa: BLE001  any bad answer: plan those groups here
        return None
    if not isinstance(found, dict) or not {"metas", "owners", "key_dtypes"} <= found.keys():
        return None
    return found
