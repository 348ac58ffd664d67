"""Reader for a directory of per-episode ``.npz`` files (layout shape ``"per-file"``).

Episode files are those matching ``file_pattern`` directly inside the directory, in natural
order of their names (``ep2.npz`` before ``ep10.npz``). Opening reads only the array headers;
:meth:`read` loads the requested episodes' files (without unpickling anything).

Every matching name must be a regular file (a dangling link, a link loop, a FIFO, a device or
a sub-directory is refused by name; a FIFO is never opened), and no two names may be the same
file (a symbolic or hard link would give two episodes the same data).
"""

from __future__ import annotations

import contextlib
import fnmatch
import os

from goalkit.errors import LogError
from goalkit.logs import limits, spare
from goalkit.logs.access import NpzAccess
from goalkit.logs.episodic import EpisodicSource, join_parts, read_episode
from goalkit.logs.frontier import Frontier, plan_downwards, plan_upwards
from goalkit.logs.naming import natural_sorted
from goalkit.logs.npzfile import NpzArrays
from goalkit.logs.planspawn import (finish_helper, groups_digest, helper_split, let_go_if_unneeded, start_helper,
                                    stop_helper)

#: Planning cost per episode file, in seconds (the helper's share is sized by it).
SECONDS_PER_FILE = 170e-6


def episode_files(directory, pattern: str) -> list[str]:
    """Files in ``directory`` matching ``pattern``, in natural order (full paths)."""
    directory = str(directory)
    if not os.path.exists(directory):
        raise LogError("directory not found", file=directory)
    if not os.path.isdir(directory):
        raise LogError("expected a directory of per-episode files, got a file", file=directory)
    names = [n for n in os.listdir(directory) if fnmatch.fnmatchcase(n, pattern)]
    if not names:
        raise LogError(f"no files match file_pattern = \"{pattern}\"", file=directory, key="file_pattern")
    paths = [os.path.join(directory, n) for n in natural_sorted(names)]
    seen = {}
    for p in paths:
        limits.regular_file(p, what="a per-episode .npz file")
        st = os.stat(p)
        other = seen.setdefault((st.st_dev, st.st_ino), p)
        if other != p:
            raise LogError(f"is the same file as {other} (a link); expected each episode in its own file",
                           file=p, key="file_pattern")
    return paths


class PerFileSource(EpisodicSource):
    """A directory of per-episode .npz files. Use :func:`goalkit.logs.open_logs` to make one."""

    def __init__(self, path, layout, skip_bad_episodes=False, advance=None):
        super().__init__(path, layout, skip_bad_episodes, advance)
        self.files = episode_files(self.path, layout.file_pattern)
        spare.prestart(self.files)      # for the build's planning helper and chunk reader
        # a file that is not an .npz fails in NpzArrays: a file-level error, not skipped
        self._adopt(*self._plan_files())

    def _plan_files(self):
        """Plan every episode file, in order (as :meth:`_plan_all`). With many files and a second
        CPU, a helper process plans the last part of them at the same time
        (:mod:`goalkit.logs.planspawn`), from the last file down until the two meet
        (:mod:`goalkit.logs.frontier`); any episode it found a problem in, and its whole part
        when it gives no clean answer, is planned again here, so the metas and the problems
        (with their messages) are the serial ones."""
        total = len(self.files)
        split = helper_split(total, self.skip_bad_episodes, seconds_per_item=SECONDS_PER_FILE)
        frontier = None if split is None else Frontier.create(total)
        helper = None if split is None else start_helper(self, split, frontier=frontier)   # closes it on failure
        frontier = None if helper is None else frontier
        metas, problems = [], []

        def mine(start, stop):
            for e in range(start, stop):
                meta, problem = self._plan_one(e)
                metas.append(meta)
                if problem is not None:
                    problems.append((e, problem))

        try:
            if frontier is not None:
                stop = plan_upwards(frontier, 0, mine)          # until the helper's claim
            else:
                stop = total if helper is None else split
                mine(0, stop)
        except BaseException:
            if helper is not None:
                stop_helper(helper, frontier)
            raise
        if helper is None or let_go_if_unneeded(helper, frontier, stop, total):
            return metas, problems
        found = finish_helper(helper, expect=("metas", "problems", "start"), frontier=frontier)
        first = None if found is None else found["start"]
        if first is None or first > stop or len(found["metas"]) != total - first:
            mine(stop, total)                                   # no clean answer: plan them here
            return metas, problems
        for e in sorted(e for e in found["problems"] if e >= stop):   # the message, made here
            _, problem = self._plan_one(e)
            problems.append((e, problem))
        return metas + found["metas"][stop - first:], problems

    def _plan_one(self, e):
        """``(meta, None)`` or ``(None, LogError)`` of episode ``e``."""
        return self._plan_access(self._episode_access(e), e)

    @staticmethod
    def plan_part(request: dict) -> dict:
        """The planning helper's work: plan files ``request["start"] ..`` of the episode files
        ``request["files"]``; ``{"metas", "problems"}`` (the episodes with a problem, by number).

        Raises
        ------
        ValueError
            When the files are not the ones the caller listed (``digest``).
        LogError
            A file-level problem (the caller then plans the part itself and names it).
        """
        files = list(request["files"])
        if groups_digest(files) != request["digest"]:
            raise ValueError("the file list changed")
        src = PerFileSource.__new__(PerFileSource)
        src.path, src.layout, src.files = request["path"], request["layout"], files
        batches, problems = [], []

        def batch(start, stop):
            part = []
            for e in range(start, stop):
                meta, problem = src._plan_one(e)
                part.append(meta)
                if problem is not None:
                    problems.append(e)
            batches.append(part)

        if "frontier" in request:
            frontier = Frontier.attach(request["frontier"])
            try:
                start = plan_downwards(frontier, len(files), batch)   # from the last file down
            finally:
                frontier.close()
            batches.reverse()
        else:
            start = int(request["start"])
            batch(start, len(files))
        return {"metas": [m for part in batches for m in part], "problems": sorted(problems), "start": start}

    def plan_request(self, split: int, frontier: str | None = None) -> dict:
        """What the planning helper is sent for files ``split ..`` (with the path of a
        ``frontier``: from the last file down until it meets this process,
        :mod:`goalkit.logs.frontier`)."""
        request = {"path": self.path, "layout": self.layout, "files": self.files, "start": split,
                   "digest": groups_digest(self.files)}
        if frontier is not None:
            request["frontier"] = frontier
        return request

    def _episode_access(self, e) -> NpzAccess:
        arrays = NpzArrays(self.files[e], max_rows=limits.MAX_EPISODE_STEPS, episode=e)
        return NpzAccess(arrays, episode=e)

    def _file_of(self, episode):
        return self.files[episode]

    @contextlib.contextmanager
    def _first_access(self):
        yield self._episode_access(int(self.episode_ids[0]))

    def _read_episodes(self, ids):
        parts = []
        for e in ids.tolist():
            acc = self._episode_access(e)
            try:
                parts.append(read_episode(acc, self.layout, self.metas[e], e, self.obs_dtype,
                                          self.action_dtype))
            finally:
                acc.arrays.close()
        return join_parts(parts, [self.metas[e].task for e in ids.tolist()], self.layout)
