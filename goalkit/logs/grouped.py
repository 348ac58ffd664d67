"""Reader for HDF5 logs with one group per episode (layout shape ``"grouped"``).

The ``episode_groups`` pattern has one component per nesting level (``"runs/*"``,
``"day*/ep_*"``); each component is matched with :mod:`fnmatch` against the link names at
that level, and names are taken in natural order (``ep2`` before ``ep10``), level by level.
Only each episode's own datasets are read, one episode group at a time.

Links among the matched names are looked at before they are followed: an external link (it
would read another file), a dangling soft link or a soft-link loop is refused by name, and so
is a name that reaches the same group as another episode. Inside each episode group the keys
are checked the same way (see :class:`~goalkit.logs.access.H5Access`), and a dataset reached
from two episodes is refused. Anything h5py raises on a damaged file becomes one LogError
naming the file, the group or key and the episode.
"""

from __future__ import annotations

import contextlib
import fnmatch

import h5py

from goalkit.errors import LogError
from goalkit.logs import limits
from goalkit.logs.access import READ_ERRORS, DatasetOwners, H5Access, describe_link, guard, open_h5, short
from goalkit.logs import access, spare
from goalkit.logs.checks import MAX_WIDTH
from goalkit.logs.episodic import EpisodicSource, join_parts, read_episode
from goalkit.logs.frontier import Frontier, plan_downwards, plan_upwards
from goalkit.logs.groupplan import plan_group, plan_keys
from goalkit.logs.groupread import read_groups, read_plan
from goalkit.logs.held import file_identity, open_log
from goalkit.logs.naming import natural_sorted
from goalkit.logs.planspawn import (finish_helper, groups_digest, helper_split, let_go_if_unneeded, start_helper,
                                    stop_helper)


def linked(group, name: str, file, path: str | None = None):
    """The object linked as ``name`` in ``group``, refusing external links and soft links that
    do not resolve, by name (``path``: the name's full path, for messages)."""
    if path is None:
        path = f"{group.name.strip('/')}/{name}".strip("/")
    try:
        kind = group.id.links.get_info(name.encode("utf-8")).type
    except READ_ERRORS as exc:
        raise LogError(f"cannot read the link, the file may be corrupt ({exc})", file=file, key=path) from None
    if kind == h5py.h5l.TYPE_EXTERNAL:
        raise LogError(describe_link(group.file, "/" + path), file=file, key=path)
    try:
        obj = group.get(name)
    except READ_ERRORS as exc:
        why = describe_link(group.file, "/" + path) if kind == h5py.h5l.TYPE_SOFT else None
        raise LogError(why or f"cannot open, the file may be corrupt ({exc})", file=file, key=path) from None
    if obj is None and kind == h5py.h5l.TYPE_SOFT:
        raise LogError(describe_link(group.file, "/" + path) or "is a soft link that does not resolve",
                       file=file, key=path)
    return obj


def match_groups(h5file, pattern: str, file=None, checked: bool = True) -> list[str]:
    """Paths of the groups matching ``pattern``, in natural order level by level.

    With ``checked=False``, every name matching the last level is listed without looking at what
    it names (a dataset, a link): a few hundredths of a second where the checks take about
    :data:`CHECK_SECONDS_PER_GROUP` per group, and the same list whenever every name is a group
    of its own (the common case).

    Raises
    ------
    LogError
        A matching name is an external link, a soft link that does not resolve, or reaches the
        same group as another matching name.
    """
    file = h5file.filename if file is None else file
    level = [("", h5file)]
    parts = pattern.strip("/").split("/")
    for depth, part in enumerate(parts):
        last = depth == len(parts) - 1
        nxt = []
        for p, group in level:
            names = [n for n in group.keys() if fnmatch.fnmatchcase(n, part)]
            for n in natural_sorted(names):
                path = f"{p}/{n}" if p else n
                if last and not checked:
                    nxt.append((path, path))
                    continue
                if last:
                    ident = _hard_group(group, n)
                    if ident is not None:        # the common case, without opening the group
                        if ident is not False:
                            nxt.append((path, ident))
                        continue
                obj = linked(group, n, file, path)
                if isinstance(obj, h5py.Group):
                    # the episode groups themselves are not kept open (tens of thousands of
                    # open groups hold HDF5 memory): only their identity
                    nxt.append((path, _identity(obj, file, path) if last else obj))
        level = nxt
    seen = {}
    for path, ident in level:
        other = seen.setdefault(ident, path)
        if other != path:
            raise LogError(f"is the same group as {other} (a link); expected each episode group to "
                           f"hold its own data", file=file, key=path)
    return [path for path, _ in level]


#: Seconds per group of :func:`match_groups`'s checks of the last level (a link look-up and an
#: object-header read per name: 0.4 s at 21,000 groups, 0.08 s at 4,250, on the 2-core reference
#: machine); a planning helper started before them gets a larger share by that much.
CHECK_SECONDS_PER_GROUP = 20e-6


def _hard_group(group, name: str):
    """(file number, address) of the group hard-linked as ``name``, False when it is a hard link
    to something else (a dataset, which :func:`match_groups` skips), None for anything else (a
    soft or external link, an error: :func:`linked` looks at those and names the problem)."""
    raw = name.encode("utf-8")
    try:
        if group.id.links.get_info(raw).type != h5py.h5l.TYPE_HARD:
            return None
        info = h5py.h5o.get_info(group.id, raw)
    except READ_ERRORS:
        return None
    if info.type != h5py.h5o.TYPE_GROUP:
        return False
    return (info.fileno, info.addr)


def _identity(group, file, path) -> tuple:
    """(file number, address) of an open group: what makes two names the same group."""
    try:
        info = h5py.h5o.get_info(group.id)
    except READ_ERRORS as exc:
        raise LogError(f"cannot read the group, the file may be corrupt ({short(exc)})", file=file,
                       key=path) from None
    return (info.fileno, info.addr)


class GroupedSource(EpisodicSource):
    """HDF5 log, one group per episode. Use :func:`goalkit.logs.open_logs` to make one."""

    def __init__(self, path, layout, skip_bad_episodes=False, advance=None):
        super().__init__(path, layout, skip_bad_episodes, advance)
        self.files = [self.path]
        self.key_dtypes = {}            # key -> its stored dtype, None once two episodes differ
        self.file_size = limits.regular_file(self.path, what="an HDF5 file")
        spare.prestart([self.path])     # its helpers (planning, reading) will want one
        with open_log(self.path) as h5, guard(self.path, what="cannot read the log"):
            self.identity = file_identity(self.path)    # the file whose groups are matched here
            early = self._early_helper(h5)
            try:
                self.groups = match_groups(h5, layout.episode_groups, self.path)
                if not self.groups:
                    top = natural_sorted(h5.keys())[:10]
                    raise LogError(f"no groups match episode_groups = \"{layout.episode_groups}\"; top-level "
                                   f"names: {', '.join(top) if top else 'none'}", file=self.path,
                                   key="episode_groups")
            except BaseException:
                if early is not None:
                    stop_helper(early[0], early[3])
                raise
            metas, problems = self._plan_groups(h5, early)
        self._adopt(metas, problems)

    def _early_helper(self, h5):
        """``(helper, split, listed, frontier)``: a planning helper started on the groups as
        listed, before :func:`match_groups` checks them, or None (too few, no second CPU, a
        listing that fails).

        The checks take about :data:`CHECK_SECONDS_PER_GROUP` per group in this process (half a
        second at 21,000 groups), and the helper plans meanwhile, from the last group down (see
        :mod:`goalkit.logs.frontier`). :meth:`_plan_groups` uses it only when the checked list
        is the listed one.
        """
        try:
            listed = match_groups(h5, self.layout.episode_groups, self.path, checked=False)
        except (LogError, *READ_ERRORS):
            return None
        split = helper_split(len(listed), self.skip_bad_episodes,
                             head_start=CHECK_SECONDS_PER_GROUP * len(listed)) if listed else None
        started = None if split is None else _start(self, split, listed)
        return None if started is None else (started[0], split, listed, started[1])

    def _plan_groups(self, h5, early=None):
        """Plan every episode group, in order (as :meth:`_plan_all`; most groups through
        :func:`~goalkit.logs.groupread.plan_group`'s low-level calls, the rest, and every
        problem, through :func:`~goalkit.logs.episodic.plan_episode`).

        With many groups and a second CPU, a helper process plans the last part of them at the
        same time (:mod:`goalkit.logs.planspawn`); its metas are taken only when it finished
        cleanly, and any episode where the two parts could disagree (a problem, a dataset both
        parts reached) is planned again here, so the result is the serial one. A helper started
        ``early`` (:meth:`_early_helper`) is kept when it was given these very groups.
        """
        total = len(self.groups)
        helper, split, frontier = (None, None, None) if early is None else (early[0], early[1], early[3])
        if helper is not None and early[2] != self.groups:     # the checks left out a name: not ours
            stop_helper(helper, frontier)
            helper = frontier = None
        if helper is None:
            split = helper_split(total, self.skip_bad_episodes)
            started = None if split is None else _start(self, split)
            helper, frontier = (None, None) if started is None else started
        seen = DatasetOwners(lambda e, ident: self._locate(h5, e, ident))
        types: dict = {}
        metas, problems = [], []

        def mine(start, stop):
            more, more_problems = self._plan_range(h5, seen, start, stop, types)
            metas.extend(more)
            problems.extend(more_problems)

        try:
            if frontier is not None:
                stop = plan_upwards(frontier, 0, mine)           # until the helper's claim
            else:
                stop = total if helper is None else split
                mine(0, stop)
        except BaseException:
            if helper is not None:
                stop_helper(helper, frontier)
            raise
        if helper is not None and let_go_if_unneeded(helper, frontier, stop, total):
            helper = None                                      # it was left nothing to plan
        if helper is not None:
            found = finish_helper(helper, expect=("metas", "owners", "key_dtypes", "start"), frontier=frontier)
            first = None if found is None else found["start"]
            if first is not None and first <= stop and len(found["metas"]) == total - first:
                self._adopt_helper(h5, seen, stop, found, metas, problems)
            else:
                mine(stop, total)
        return metas, problems

    def plan_request(self, split: int, groups=None, frontier: str | None = None) -> dict:
        """What the planning helper is sent for groups ``split ..`` of ``groups`` (default: the
        matched ones): their paths (it does not match the groups again: at 21,000 groups that
        takes half a second) and the identity of the file this process matched them in. With
        the path of a ``frontier`` (:mod:`goalkit.logs.frontier`) every group is sent, and the
        helper plans from the last one down until it meets this process."""
        groups = self.groups if groups is None else groups
        first = 0 if frontier is not None else split
        request = {"path": self.path, "layout": self.layout, "start": first, "total": len(groups),
                   "groups": groups[first:], "digest": groups_digest(groups[first:]),
                   "identity": self.identity}
        if frontier is not None:
            request["frontier"] = frontier
        return request

    @staticmethod
    def plan_part(request: dict) -> dict:
        """The planning helper's work (:mod:`goalkit.logs.planspawn`): plan groups
        ``request["start"] ..`` of the log at ``request["path"]``; the answer for the caller.

        Raises
        ------
        ValueError
            When the log's groups are not the ones the caller matched (``total``, ``digest``).
        """
        src = GroupedSource.__new__(GroupedSource)
        src.path, src.layout = str(request["path"]), request["layout"]
        src.skip_bad_episodes = False
        src.key_dtypes = {}
        src.file_size = limits.regular_file(src.path, what="an HDF5 file")
        start, total, part = int(request["start"]), int(request["total"]), list(request["groups"])
        if start + len(part) != total or groups_digest(part) != request["digest"]:
            raise ValueError("the request's groups do not add up")
        with open_log(src.path) as h5:       # a helper that holds its logs keeps it open for its reads
            if request["identity"] is None or file_identity(src.path) != request["identity"]:
                raise ValueError("the log is not the file the caller opened")
            src.groups = [""] * start + part          # only groups start .. are planned here
            seen = DatasetOwners(lambda e, ident: "")
            if "frontier" in request:
                frontier = Frontier.attach(request["frontier"])
                try:
                    start, metas = _plan_down(src, h5, seen, frontier, total)
                finally:
                    frontier.close()
            else:
                metas, _ = src._plan_range(h5, seen, start, total)
        return {"metas": metas, "owners": seen.claims(start), "key_dtypes": src.key_dtypes, "start": start}

    def _plan_range(self, h5, seen, start, stop, types=None):
        """Plan episode groups ``start .. stop - 1`` (see :meth:`_plan_groups`); ``types``, a
        dict kept between calls, saves converting each key's HDF5 type again."""
        keys = plan_keys(self.layout)
        fileno = h5py.h5o.get_info(h5.id).fileno
        metas, problems = [], []
        types = {} if types is None else types
        for e in range(start, stop):
            path = self.groups[e]
            with guard(self.path, path, e, "cannot open the episode group"):
                gid = h5py.h5g.open(h5.id, path.encode("utf-8"))
            found = None if keys is None else plan_group(
                gid, path.strip("/"), self.layout, e, seen, fileno, self.file_size, limits.MAX_EPISODE_STEPS,
                limits.MAX_ROW_VALUES, MAX_WIDTH, access.MAX_ATTR_VALUES, types)
            if found is not None:
                metas.append(found[0])
                self._note_dtypes(found[1])
                continue
            meta, problem = self._plan_general(gid, e, seen)
            metas.append(meta)
            if problem is not None:
                problems.append((e, problem))
        return metas, problems

    def _plan_general(self, gid, e, seen):
        """``(meta, None)`` or ``(None, LogError)`` of one episode through plan_episode."""
        acc = H5Access(h5py.Group(gid), self.path, file_size=self.file_size,
                       max_rows=limits.MAX_EPISODE_STEPS, episode=e, seen=seen)
        return self._plan_access(acc, e)

    def _adopt_helper(self, h5, seen, start, found, metas, problems):
        """Take the helper's metas of groups ``start ..`` (it planned from ``found["start"]``,
        which may be lower: those are this process's), in episode order: an episode the helper
        could not plan, or one that reached a dataset an earlier episode reached, is planned
        again here, so the metas and the problems are the serial ones whatever order the helper
        planned in."""
        owners = seen.owners()
        claims: dict = {}
        for addr, e in found["owners"]:
            if e >= start:
                claims.setdefault(e, []).append(addr)
        if found["key_dtypes"] is None:
            self.key_dtypes = None
        else:
            self._note_dtypes(found["key_dtypes"])
        skip = start - found["start"]
        for i, meta in enumerate(found["metas"][skip:]):
            e = start + i
            reached = claims.get(e, ())
            if meta is not None and all(owners.get(addr, e) == e for addr in reached):
                for addr in reached:
                    owners[addr] = e
            else:
                with guard(self.path, self.groups[e], e, "cannot open the episode group"):
                    gid = h5py.h5g.open(h5.id, self.groups[e].encode("utf-8"))
                meta, problem = self._plan_general(gid, e, seen)
                if problem is not None:
                    problems.append((e, problem))
            metas.append(meta)

    def _locate(self, h5, episode: int, ident) -> str:
        """The key of ``episode`` that reaches the dataset ``ident`` (for a message)."""
        acc = self._episode_access(h5, episode)
        for key in self._layout_keys():
            try:
                info = acc._lookup(key)
                if info is not None:
                    obj = h5py.h5o.get_info(info[0])
                    if (obj.fileno, obj.addr) == tuple(ident):
                        return acc.where(key)
            except (LogError, *READ_ERRORS):
                continue
        return f"{self.groups[episode]}/?"

    def _layout_keys(self) -> list:
        lay, k = self.layout, self.layout.keys
        keys = [k.action, *lay.observation_keys(), *lay.next_observation_keys()]
        keys += [getattr(k, r) for r in ("reward", "success", "termination", "time_limit", "task_goal",
                                         "frame", "task")]
        return [key for key in keys if key is not None]

    def _episode_access(self, h5, e, seen=None) -> H5Access:
        with guard(self.path, self.groups[e], e, "cannot open the episode group"):
            # the low-level open is several times cheaper than h5[path] (the path was checked
            # to be a group of this file when the episodes were matched)
            group = h5py.Group(h5py.h5g.open(h5.id, self.groups[e].encode("utf-8")))
            return H5Access(group, self.path, file_size=self.file_size,
                            max_rows=limits.MAX_EPISODE_STEPS, episode=e, seen=seen)

    def _planned(self, acc) -> None:
        self._note_dtypes({key: info[2] for key, info in acc._info.items() if info is not None})

    def _note_dtypes(self, dtypes: dict) -> None:
        found = self.key_dtypes
        if found is None:
            return
        for key, dtype in dtypes.items():
            if found.setdefault(key, dtype) != dtype:
                self.key_dtypes = None
                return

    def _fast_plan(self):
        """What :func:`~goalkit.logs.groupread.read_groups` reads for this log (None: not served)."""
        if not hasattr(self, "_fast"):
            ref = next((m for m in self.metas if m is not None), None)
            self._fast = None if ref is None else read_plan(self.layout, self.convention, self.key_dtypes,
                                                            self.obs_dtype, self.action_dtype)
            if self._fast is not None:
                self._tails = {"actions": (ref.action_width,), "task_goals": (ref.goal_width,),
                               "frames": ref.frame_shape or ()}
                self._widths = ref.obs_widths
        return self._fast

    def _key_of(self, episode, key):
        return f"{self.groups[episode]}/{key}" if key else self.groups[episode]

    @contextlib.contextmanager
    def _first_access(self):
        e = int(self.episode_ids[0])
        with open_h5(self.path) as h5, guard(self.path, self.groups[e], e):
            yield self._episode_access(h5, e)

    def _read_episodes(self, ids):
        fast = self._fast_plan()
        with open_log(self.path) as h5:        # held open between reads in a build's own processes
            if fast is not None:
                cols = read_groups(h5, self.groups, self.metas, ids, fast, self._widths, self._tails, self.layout)
                if cols is not None:
                    return cols
            parts = []
            for e in ids.tolist():
                acc = self._episode_access(h5, e)
                with guard(self.path, self.groups[e], e, "cannot read the episode"):
                    parts.append(read_episode(acc, self.layout, self.metas[e], e, self.obs_dtype,
                                              self.action_dtype))
        return join_parts(parts, [self.metas[e].task for e in ids.tolist()], self.layout)


def _start(source, split: int, groups=None):
    """``(helper, frontier)`` planning ``source``'s groups with this process (the frontier None
    when no shared file could be made: the helper then plans ``split ..``), or None."""
    frontier = Frontier.create(len(source.groups if groups is None else groups))
    helper = start_helper(source, split, groups, frontier=frontier)     # closes it on failure
    return None if helper is None else (helper, frontier)


def _plan_down(src, h5, seen, frontier, total):
    """The helper's planning from the last group down (:func:`~goalkit.logs.frontier.plan_downwards`):
    ``(first episode planned, metas from it on)``."""
    batches, types = [], {}

    def batch(start, stop):
        batches.append(src._plan_range(h5, seen, start, stop, types)[0])

    first = plan_downwards(frontier, total, batch)
    return first, [m for part in reversed(batches) for m in part]
