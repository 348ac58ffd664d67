"""A second process that plans the last part of a grouped log's episode groups.

Planning a grouped log opens every dataset of every episode group, one HDF5 call after another:
about a quarter of a millisecond per group, serial in one process (h5py's lock). With many
groups and a second CPU, :class:`~goalkit.logs.grouped.GroupedSource` has one helper process
(the build's waiting spare, else a new one: :mod:`goalkit.logs.spare`; no fork of a process
holding HDF5 handles and threads, no re-import of the user's main module) plan the last part of
the groups (:meth:`~goalkit.logs.grouped.GroupedSource.plan_part`) while it plans the first part
itself. The request travels on the helper's stdin and the metas come back on its stdout,
pickled; a helper that answered goes back to the spare slot for the build's chunk reader.
Anything unexpected (no second CPU, the helper cannot start, fails, or answers for other
groups) and the caller plans those groups itself: the helper only ever saves time, it never
changes the result. Per-file folders are shared the same way
(:meth:`~goalkit.logs.perfile.PerFileSource.plan_part`).
"""

from __future__ import annotations

import hashlib
import os

from goalkit.logs import spare
from goalkit.logs.spare import cpus

#: Fewest episode groups worth a helper process (below, its start-up costs more than it saves),
#: with a spare already waiting (see :mod:`goalkit.logs.spare`) and without.
MIN_GROUPS = 1_500
MIN_GROUPS_COLD = 6_000
#: Start-up of a new helper (interpreter, numpy, h5py, goalkit's readers), and what the helper
#: does before it plans (read the request with its groups' paths or files, open the log), in
#: seconds (measured on the 2-core reference machine; with the cost per group they set how the
#: groups are shared). The start-up
#: is that of an installed copy, its bytecode compiled, one math-library thread
#: (:mod:`goalkit.threadenv`): 0.11 s from start to a first answer, median of 7; an interpreter
#: that must compile goalkit's sources first takes about 0.25 s. The helper is sent the paths of
#: its groups rather than matching them again (0.1 s at 4,250 groups, 0.5 s at 21,000).
STARTUP_SECONDS = 0.12
MATCH_SECONDS = 0.02
SECONDS_PER_GROUP = 250e-6
#: Environment variable that turns the helper off (``GOALKIT_PLAN_HELPER=0``).
SWITCH = "GOALKIT_PLAN_HELPER"


def helper_split(total: int, skip_bad_episodes: bool = False, seconds_per_item: float = SECONDS_PER_GROUP,
                 head_start: float = 0.0) -> int | None:
    """First group the helper plans, or None when no helper is worth starting.

    The caller plans ``0 .. split - 1`` and the helper ``split .. total - 1``, shared so that
    both finish together: the caller's part is larger by the helper's start-up (shorter when a
    spare process is already waiting), smaller by ``head_start``, seconds of other work the
    caller does before it plans (at least a tenth of the groups each).
    """
    age = spare.waiting_for()
    if total < (MIN_GROUPS if age is not None else MIN_GROUPS_COLD) or skip_bad_episodes or cpus() < 2 \
            or os.environ.get(SWITCH, "1") == "0":
        return None
    startup = MATCH_SECONDS + max(0.0, STARTUP_SECONDS - (age or 0.0)) - head_start
    mine = min(0.9, max(0.1, (1 + startup / (total * seconds_per_item)) / 2))
    return int(total * mine)


def groups_digest(groups) -> str:
    """SHA-256 of the group paths, so the helper answers for the very same groups."""
    return hashlib.sha256("\n".join(groups).encode("utf-8")).hexdigest()


def start_helper(source, split: int, groups=None, frontier=None):
    """Ask a helper (the build's waiting spare, else a new process) to plan groups ``split ..``
    of ``source`` (a GroupedSource; of ``groups``, a list of its group paths, when given); None
    on failure. With a ``frontier`` (:class:`~goalkit.logs.frontier.Frontier`) the helper plans
    from the last group downwards until it meets the caller instead (``split`` is then unused);
    on failure the frontier is closed here."""
    args = (split,) if groups is None else (split, groups)
    request = source.plan_request(*args) if frontier is None else source.plan_request(*args, frontier=frontier.path)
    helper = spare.take()
    if helper is None or not helper.send({"call": type(source).plan_part, "each": [(request,)]}):
        if frontier is not None:
            frontier.close()
        return None
    return helper


def stop_helper(helper, frontier=None) -> None:
    """Stop a helper whose answer is no longer wanted (the caller failed or was interrupted), and
    close its ``frontier`` if it has one."""
    helper.close()
    if frontier is not None:
        frontier.close()


def let_go_if_unneeded(helper, frontier, stop: int, total: int) -> bool:
    """Stop ``helper`` without waiting for its answer when nothing is left for it; True if so.

    With a ``frontier``, the caller planned up to ``stop``: when that is every episode
    (``total``), the helper found them all claimed and plans nothing. A stand-in without a
    process of its own (a build's worker, :class:`goalkit.pipeline.poolspare.PoolSpare`, whose
    task may wait behind a busy cluster's other work) is then let go at once instead of waited
    for. A spare process is still waited for (it answers as soon as it has started, and goes
    back to the build's spare slot for the chunk reader).
    """
    if frontier is None or stop < total or getattr(helper, "proc", None) is not None:
        return False
    stop_helper(helper, frontier)
    return True


def finish_helper(helper, expect=("metas", "owners", "key_dtypes"), frontier=None) -> dict | None:
    """The helper's answer (a dict with the keys ``expect``), or None if it has none; its
    ``frontier``, if it has one, is closed once the answer is in (or the wait failed).

    A helper that answered goes back to the build's spare slot, for its chunk reader.
    """
    try:
        found = helper.receive()
    finally:
        if frontier is not None:
            frontier.close()
    if not isinstance(found, dict) or not set(expect) <= found.keys():
        helper.close()
        return None
    spare.give_back(helper)
    return found
