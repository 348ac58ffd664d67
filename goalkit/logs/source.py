"""The common part of every reader: kept episodes, the skip policy, chunked reads.

A reader subclass finds its episodes and checks their metadata (``_episode_problems``), and
reads a list of episodes (``_read_episodes``). This base class applies the policy:

* per-episode problems (a missing key in one episode, disagreeing lengths, an empty episode,
  NaN/inf values, a task id that changes) raise a LogError, or with ``skip_bad_episodes`` skip
  the episode, recorded in ``skipped`` and counted in ``notes`` -- never silently;
* file-level problems (missing or unreadable files, a broken layout) always raise.

Values (NaN/inf, flag values) are only known once read. Without skipping they are checked in
:meth:`read`, so an error names the first bad episode and step when its chunk is read. With
skipping, :func:`~goalkit.logs.open_logs` reads the log once, chunk by chunk, so that the kept
episodes are known before the first :meth:`read`.
"""

from __future__ import annotations

import numpy as np

from goalkit.errors import LogError
from goalkit.logs import checks
from goalkit.logs.episodes import EpisodeSet, chunk_bounds

#: Transitions per chunk of the value check made at open time with skip_bad_episodes.
CHECK_CHUNK = 200_000


class BaseSource:
    """A log opened for reading (implements :class:`~goalkit.logs.episodes.LogSource`).

    Attributes
    ----------
    path : str
        The log (file or directory).
    files : list of str
        Every file the reader reads (for checksums).
    lengths : ndarray of int64
        Transitions per kept episode.
    episode_ids : ndarray of int64
        Position in the whole log of each kept episode (stable, also when others are skipped).
    fields : dict of str to (int, int)
        Named observation fields and their column ranges.
    notes : list of str
        What the reader did that a user should know (e.g. "last action dropped").
    skipped : list of (int, str)
        Skipped episodes (position in the whole log) and why.
    layout : Layout
        The layout the log was read with.
    convention : str
        How observations were stored: ``"T+1"``, ``"pairs"`` or ``"T"``.
    """

    def __init__(self, path, layout, skip_bad_episodes=False, advance=None):
        self.path = str(path)
        self._advance = advance          # progress of the open-time value check; not kept
        self.layout = layout
        self.skip_bad_episodes = bool(skip_bad_episodes)
        self.files: list[str] = []
        self.notes: list[str] = []
        self.skipped: list[tuple[int, str]] = []
        self.fields: dict[str, tuple[int, int]] = {}
        self.convention = "T+1"
        self.obs_dtype = np.dtype(np.float64)
        self.action_dtype = np.dtype(np.float64)
        self.obs_width = 0
        self.total_episodes = 0
        self.lengths = np.zeros(0, dtype=np.int64)
        self.episode_ids = np.zeros(0, dtype=np.int64)

    # ---- to be provided by readers -------------------------------------------------------
    def _read_episodes(self, ids: np.ndarray) -> dict:
        """Return the concatenated columns of the given episodes (ids in the whole log)."""
        raise NotImplementedError

    # ---- policy ---------------------------------------------------------------------------
    def _settle(self, all_lengths, problems):
        """Apply the skip policy to per-episode problems found at open time.

        Parameters
        ----------
        all_lengths : array of int
            Transitions of every episode in the log (any value for bad ones).
        problems : list of (int, LogError)
            Per-episode problems, episode = position in the whole log.
        """
        all_lengths = np.asarray(all_lengths, dtype=np.int64)
        self.total_episodes = int(all_lengths.shape[0])
        if self.total_episodes == 0:
            raise LogError("no episodes found; expected at least one", file=self.path)
        problems = sorted(problems, key=lambda p: p[0])
        if problems and not self.skip_bad_episodes:
            raise problems[0][1]
        bad = np.zeros(self.total_episodes, dtype=bool)
        for e, err in problems:
            bad[e] = True
            self.skipped.append((int(e), err.render()))
        self.episode_ids = np.flatnonzero(~bad).astype(np.int64)
        self.lengths = all_lengths[self.episode_ids]
        self._check_kept()
        if self.skip_bad_episodes:
            self._skip_bad_values()
        self._advance = None             # keep the source picklable

    def _check_kept(self):
        if self.episode_ids.shape[0] == 0:
            raise LogError(f"no usable episodes: all {self.total_episodes} were skipped; first: "
                           f"{self.skipped[0][1]}", file=self.path)

    def _skip_bad_values(self):
        """Read the kept episodes once, chunk by chunk, and skip those with bad values."""
        bad_ids = []
        for a, b in chunk_bounds(self.lengths, CHECK_CHUNK):
            if self._advance is not None:
                self._advance(int(self.lengths[a:b].sum()))
            try:
                self.read(a, b)
                continue
            except LogError as exc:
                if exc.episode is None:
                    raise
            for e in range(a, b):          # isolate the bad ones, one episode at a time
                try:
                    self.read(e, e + 1)
                except LogError as exc:
                    if exc.episode is None:
                        raise
                    bad_ids.append(int(self.episode_ids[e]))
                    self.skipped.append((int(self.episode_ids[e]), exc.render()))
        if bad_ids:
            keep = ~np.isin(self.episode_ids, bad_ids)
            self.episode_ids = self.episode_ids[keep]
            self.lengths = self.lengths[keep]
            self.skipped.sort(key=lambda s: s[0])
            self._check_kept()
        if self.skipped:
            self.notes.append(f"skipped {len(self.skipped)} of {self.total_episodes} episodes "
                              f"(see skipped)")

    # ---- reading --------------------------------------------------------------------------
    @property
    def num_episodes(self) -> int:
        """Number of kept episodes."""
        return int(self.lengths.shape[0])

    def read(self, start: int, stop: int) -> EpisodeSet:
        """Read kept episodes at positions ``start .. stop - 1``.

        Parameters
        ----------
        start, stop : int
            Positions among the kept episodes (``0 <= start <= stop <= num_episodes``).

        Returns
        -------
        EpisodeSet
            Only those episodes; ``episode_ids`` are their positions in the whole log.

        Raises
        ------
        LogError
            On NaN/inf values or bad flag values (naming episode and step), or unreadable data.
        """
        start, stop = int(start), int(stop)
        if not 0 <= start <= stop <= self.num_episodes:
            raise IndexError(f"episode range {start}:{stop} outside 0:{self.num_episodes}")
        ids = self.episode_ids[start:stop]
        lengths = self.lengths[start:stop]
        offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
        if stop == start:
            cols = self._empty_columns()
        else:
            cols = self._read_episodes(ids)
        es = EpisodeSet(offsets=offsets, episode_ids=ids.copy(), fields=dict(self.fields),
                        source=self.path, **cols)
        self._check_values(es)
        return es

    def _empty_columns(self) -> dict:
        cols = {"observations": np.zeros((0, self.obs_width), dtype=self.obs_dtype),
                "actions": np.zeros((0, getattr(self, "action_width", 1)), dtype=self.action_dtype)}
        k = self.layout.keys
        if k.reward is not None:
            cols["rewards"] = np.zeros(0, dtype=np.float64)
        if k.success is not None:
            cols["success"] = np.zeros(0, dtype=bool)
        if k.task is not None:
            cols["task_ids"] = np.zeros(0, dtype=np.int64)
        for role, name in (("termination", "terminations"), ("time_limit", "time_limits")):
            if getattr(k, role) is not None:
                cols[name] = np.zeros(0, dtype=bool)
        return cols

    def _file_of(self, episode: int) -> str:
        """The file holding an episode (readers with several files override this)."""
        return self.path

    def _key_of(self, episode: int, key: str) -> str:
        """The full name of a key of an episode (grouped logs prefix the group path)."""
        return key

    def _check_values(self, es: EpisodeSet):
        k = self.layout.keys
        columns = [(es.observations, k.observation or "+".join(self.layout.observation_keys()), True),
                   (es.actions, k.action, False), (es.rewards, k.reward, False),
                   (es.task_goals, k.task_goal, False)]
        for values, key, state_level in columns:
            if values is None:
                continue
            found = checks.first_bad(values, es.offsets, state_level=state_level)
            if found is not None:
                pos, step = found
                e = int(es.episode_ids[pos])
                if state_level and self.layout.fields:
                    row = values[int(es.state_offsets()[pos]) + step]
                    col = int(np.flatnonzero(~np.isfinite(row))[0])
                    key = next(k for (name, k) in self.layout.fields
                               if self.fields[name][0] <= col < self.fields[name][1])
                what = "state" if state_level else "step"
                raise LogError(f"expected finite values, got NaN or inf (first bad {what})",
                               file=self._file_of(e), key=self._key_of(e, key), episode=e, step=step)
        self._check_end_flags(es)

    def _check_end_flags(self, es: EpisodeSet):
        """The environment's end flags may be true only on an episode's last transition."""
        k = self.layout.keys
        for values, key, what in ((es.terminations, k.termination, "termination"),
                                  (es.time_limits, k.time_limit, "time-limit")):
            if values is None or values.shape[0] == 0:
                continue
            last = np.zeros(values.shape[0], dtype=bool)
            last[es.offsets[1:][es.lengths > 0] - 1] = True
            early = np.flatnonzero(values & ~last)
            if early.size:
                row = int(early[0])
                pos = int(np.searchsorted(es.offsets, row, side="right") - 1)
                e, step = int(es.episode_ids[pos]), row - int(es.offsets[pos])
                raise LogError(f"the {what} flag is true at step {step} of {int(es.lengths[pos])}; expected "
                               f"it only on the episode's last step (do the boundaries agree with the "
                               f"flags?)", file=self._file_of(e), key=self._key_of(e, key), episode=e,
                               step=step)

    def key_info(self) -> list[dict]:
        """Role, key, stored dtype and shape of every mapped key (first kept episode for logs
        with one container per episode; ``"attribute"`` marks a task id stored as one)."""
        lay = self.layout
        pairs = [(r, key) for r, key in lay.keys.items()] + [(f"field {n}", key) for n, key in lay.fields]
        if lay.boundaries is not None:
            pairs += [(f"boundary ({kind})", key) for kind, key in lay.boundaries.items()]
        out = []
        with self._first_access() as acc:
            for role, key in pairs:
                if acc.has(key):
                    out.append({"role": role, "key": acc.where(key), "dtype": str(acc.dtype(key)),
                                "shape": list(acc.shape(key))})
                else:
                    value = acc.attr(key)
                    dtype = "" if value is None else str(getattr(value, "dtype", type(value).__name__))
                    out.append({"role": role, "key": acc.where(key), "dtype": dtype, "shape": "attribute"})
        return out

    def __repr__(self):
        return (f"{type(self).__name__}({self.path!r}, episodes={self.num_episodes}, "
                f"transitions={int(self.lengths.sum())})")
