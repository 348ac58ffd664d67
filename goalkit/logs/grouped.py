"""Reader for HDF5 logs with one group per episode (layout shape ``"grouped"``).

The ``episode_groups`` pattern has one component per nesting level (``"runs/*"``,
``"day*/ep_*"``); each component is matched with :mod:`fnmatch` against the group names at
that level, and names are taken in natural order (``ep2`` before ``ep10``), level by level.
Only each episode's own datasets are read, one episode group at a time.
"""

from __future__ import annotations

import contextlib
import fnmatch

from goalkit.errors import LogError
from goalkit.logs.access import H5Access, open_h5
from goalkit.logs.episodic import EpisodicSource, join_parts, read_episode
from goalkit.logs.naming import natural_sorted


def match_groups(h5file, pattern: str) -> list[str]:
    """Paths of the groups matching ``pattern``, in natural order level by level."""
    import h5py

    paths = [""]
    for part in pattern.strip("/").split("/"):
        nxt = []
        for p in paths:
            group = h5file[p] if p else h5file
            names = [n for n, v in group.items() if isinstance(v, h5py.Group) and fnmatch.fnmatchcase(n, part)]
            nxt += [f"{p}/{n}" if p else n for n in natural_sorted(names)]
        paths = nxt
    return paths


class GroupedSource(EpisodicSource):
    """HDF5 log, one group per episode. Use :func:`goalkit.logs.open_logs` to make one."""

    def __init__(self, path, layout, skip_bad_episodes=False, advance=None):
        super().__init__(path, layout, skip_bad_episodes, advance)
        self.files = [self.path]
        with open_h5(self.path) as h5:
            self.groups = match_groups(h5, layout.episode_groups)
            if not self.groups:
                top = natural_sorted(h5.keys())[:10]
                raise LogError(f"no groups match episode_groups = \"{layout.episode_groups}\"; top-level "
                               f"names: {', '.join(top) if top else 'none'}", file=self.path,
                               key="episode_groups")
            metas, problems = self._plan_all(H5Access(h5[g], self.path) for g in self.groups)
        self._adopt(metas, problems)

    def _key_of(self, episode, key):
        return f"{self.groups[episode]}/{key}" if key else self.groups[episode]

    @contextlib.contextmanager
    def _first_access(self):
        with open_h5(self.path) as h5:
            yield H5Access(h5[self.groups[int(self.episode_ids[0])]], self.path)

    def _read_episodes(self, ids):
        parts = []
        with open_h5(self.path) as h5:
            for e in ids.tolist():
                acc = H5Access(h5[self.groups[e]], self.path)
                parts.append(read_episode(acc, self.layout, self.metas[e], e, self.obs_dtype,
                                          self.action_dtype))
        return join_parts(parts, [self.metas[e].task for e in ids.tolist()], self.layout)
