"""Reader for flat logs (layout shape ``"flat"``): one HDF5 file or one ``.npz`` whose arrays
hold every episode back to back, with episode boundaries given by ``[boundaries]``.

Row spaces. Per-action arrays (action, reward, success, task_goal, next_observation) have one
row per stored step. The observation array has either the same number of rows (conventions
``"T"`` and ``"pairs"``) or one more per episode (``"T+1"``). A boundary array (episode id or
done flag) may be aligned with either; its length says which. Offsets ending at the number of
observation rows index observation rows; any other offsets or start indices index action rows.
Frames always have one row per state (``T + 1`` per episode).

Opening reads the boundary array (and a task-id array) in full, and the shapes of the others.
:meth:`FlatSource.read` reads each run of consecutive episodes by one slice per array.
"""

from __future__ import annotations

import contextlib

import numpy as np

from goalkit.errors import LogError
from goalkit.logs import boundaries as bnd
from goalkit.logs import checks, limits
from goalkit.logs.access import H5Access, NpzAccess, guard
from goalkit.logs.held import open_log
from goalkit.logs.npzfile import NpzArrays
from goalkit.logs.source import BaseSource

#: Flag roles of the layout -> EpisodeSet column (bool, one per transition).
FLAG_COLUMNS = {"success": "success", "termination": "terminations", "time_limit": "time_limits"}

#: Rows of a per-step boundary or task array read at a time when opening a flat log.
BLOCK_ROWS = 1 << 22


def _cumsum0(x) -> np.ndarray:
    return np.concatenate([[0], np.cumsum(x)]).astype(np.int64)


def ranges_index(starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Concatenation of ``arange(s, s + c)`` for each (start, count), vectorised.

    Examples
    --------
    >>> ranges_index(np.array([5, 0]), np.array([2, 3])).tolist()
    [5, 6, 0, 1, 2]
    """
    starts = np.asarray(starts, dtype=np.int64)
    counts = np.asarray(counts, dtype=np.int64)
    total = int(counts.sum())
    return np.repeat(starts - _cumsum0(counts)[:-1], counts) + np.arange(total, dtype=np.int64)


def is_npz(path) -> bool:
    """True for a ``.npz`` name or a zip signature."""
    path = str(path)
    if path.lower().endswith(".npz"):
        return True
    try:
        with open(path, "rb") as fh:
            return fh.read(4) == b"PK\x03\x04"
    except OSError:
        return False


class FlatSource(BaseSource):
    """A flat HDF5 or .npz log. Use :func:`goalkit.logs.open_logs` to make one."""

    def __init__(self, path, layout, skip_bad_episodes=False, advance=None):
        super().__init__(path, layout, skip_bad_episodes, advance)
        self.file_size = limits.regular_file(self.path, what="one HDF5 or .npz file for shape = \"flat\"")
        self.files = [self.path]
        self._npz = NpzArrays(self.path) if is_npz(self.path) else None
        with self._access() as acc, guard(self.path, what="cannot read the log"):
            problems = self._plan(acc)
        self._settle(self.steps_all, problems)

    def _first_access(self):
        return self._access()

    @contextlib.contextmanager
    def _access(self):
        if self._npz is not None:
            yield NpzAccess(self._npz)
        else:
            with open_log(self.path) as h5:    # held open between reads in a build's own processes
                yield H5Access(h5, self.path, file_size=self.file_size, max_rows=limits.MAX_LOG_ROWS)

    # ---- open: shapes, boundaries, per-episode rows ----------------------------------------
    def _need(self, acc, key):
        if not acc.has(key):
            names = acc.names()
            raise LogError(f"missing array; found: {', '.join(names) if names else 'nothing'}",
                           file=self.path, key=key)

    def _plan(self, acc) -> list:
        lay, k, f = self.layout, self.layout.keys, self.path
        self._need(acc, k.action)
        checks.numeric(acc.dtype(k.action), file=f, key=k.action)
        n_act, self.action_width = checks.rows_2d(acc.shape(k.action), file=f, key=k.action, what="actions")
        self.action_dtype = np.dtype(acc.dtype(k.action))
        widths, dtypes, n_obs = [], [], None
        for key in lay.observation_keys():
            self._need(acc, key)
            dtypes.append(checks.numeric(acc.dtype(key), file=f, key=key))
            m, w = checks.rows_2d(acc.shape(key), file=f, key=key, what="observations")
            if n_obs is not None and m != n_obs:
                raise LogError(f"has {m} rows, the first field has {n_obs}; expected equal rows",
                               file=f, key=key)
            n_obs = m
            widths.append(w)
        for key, width in zip(lay.next_observation_keys(), widths):
            self._need(acc, key)
            dtypes.append(checks.numeric(acc.dtype(key), file=f, key=key))
            shape2 = checks.rows_2d(acc.shape(key), file=f, key=key, what="next observations")
            if shape2 != (n_act, width) or n_obs != n_act:
                raise LogError(f"has shape {acc.shape(key)}, observation has {(n_obs, width)} and action "
                               f"{n_act} rows; expected one row per action in both, of equal widths",
                               file=f, key=key)
        self.obs_dtype = checks.float_dtype(dtypes)
        self.obs_width = int(sum(widths))
        if lay.fields:
            edges = _cumsum0(widths)
            self.fields = {name: (int(edges[i]), int(edges[i + 1])) for i, (name, _) in enumerate(lay.fields)}

        counts, space, problems = self._boundaries(acc, n_act, n_obs)
        E = counts.shape[0]
        if k.next_observation is not None:
            self.convention = "pairs"
            steps = counts.copy()
            step_start = state_start = _cumsum0(counts)[:-1]
        elif n_obs == n_act:
            self.convention = "T"
            steps = counts - 1
            step_start = state_start = _cumsum0(counts)[:-1]
            self.notes.append("observations are stored one per action (T per episode): the last "
                              "action, reward and success flag of each episode are dropped")
        else:
            self.convention = "T+1"
            if space == "step":
                steps = counts.copy()
                step_start = _cumsum0(counts)[:-1]
                state_start = step_start + np.arange(E)
                if n_obs != n_act + E:
                    raise LogError(f"has {n_obs} rows, action has {n_act} in {E} episodes; expected "
                                   f"{n_act + E} (one per state, T+1 per episode) or {n_act} (one "
                                   f"per action)", file=f, key=lay.observation_keys()[0])
            else:
                steps = counts - 1
                state_start = _cumsum0(counts)[:-1]
                step_start = state_start - np.arange(E)
                if int(steps.sum()) != n_act:
                    raise LogError(f"has {n_act} rows; expected {int(steps.sum())} (one per state of "
                                   f"{lay.boundaries.keys_text} minus one per episode)", file=f, key=k.action)
        self.steps_all = np.maximum(steps, 0).astype(np.int64)
        # action rows each episode occupies in the file (T, or T + 1 in convention "T")
        self.step_rows = np.maximum(counts - 1 if space == "state" and self.convention == "T+1"
                                    else counts, 0).astype(np.int64)
        self.step_start = step_start.astype(np.int64)
        self.state_start = state_start.astype(np.int64)
        # states per episode (rows of a frame array): T + 1, or the stored rows of an empty episode
        if self.convention == "T" or (self.convention == "T+1" and space == "state"):
            states = counts
        elif self.convention == "T+1":
            states = counts + 1
        else:
            states = np.where(counts > 0, counts + 1, 0)
        self.state_rows = states.astype(np.int64)
        self.frame_start = _cumsum0(self.state_rows)[:-1]
        for e in np.flatnonzero(steps <= 0).tolist():
            extra = (" (with one observation per action the last action is dropped)"
                     if self.convention == "T" else "")
            problems.append((e, LogError(f"episode is empty: {max(int(steps[e]), 0)} transitions"
                                         f"{extra}; expected at least 1", file=f,
                                         key=lay.boundaries.keys_text, episode=e)))
        self._check_step_arrays(acc, n_act)
        problems += self._tasks(acc, n_act, E)
        return problems

    def _blocks(self, acc, key, n):
        """Rows of a 1-D array ``key`` in blocks of BLOCK_ROWS (never the whole array at once)."""
        for lo in range(0, n, BLOCK_ROWS):
            yield acc.read(key, lo, min(n, lo + BLOCK_ROWS))

    def _boundaries(self, acc, n_act, n_obs):
        """Rows per episode, their row space (``"step"`` or ``"state"``) and per-episode problems.

        With several boundary arrays, an episode ends where any of them ends one; all of them
        must count the same rows (one per action, or one per observation).
        """
        b, f = self.layout.boundaries, self.path
        found = [(kind, key) + self._boundary(acc, kind, key, n_act, n_obs) for kind, key in b.items()]
        spaces = {space for _, _, _, space, _ in found}
        if len(spaces) > 1:
            per = {"step": "one per action", "state": "one per observation"}
            text = ", ".join(f"{key} {per[space]}" for _, key, _, space, _ in found)
            raise LogError(f"the boundary arrays count different rows ({text}); expected all of them "
                           f"one per action or all one per observation", file=f, key=b.keys_text)
        space = spaces.pop()
        if len(found) == 1:
            counts, ended = found[0][2], found[0][4]
        else:
            ends = [np.cumsum(c) for _, _, c, _, _ in found]
            offset_ends = [e for e, (kind, *_) in zip(ends, found) if kind == "offsets"]
            other = np.unique(np.concatenate([e for e, (kind, *_) in zip(ends, found) if kind != "offsets"]
                                             or [np.zeros(0, np.int64)]))
            if offset_ends:       # keep the offsets' own empty episodes (reported per episode)
                other = np.sort(np.concatenate([offset_ends[0], np.setdiff1d(other, offset_ends[0])]))
            counts = np.diff(np.concatenate([[0], other])).astype(np.int64)
            ended = any(e for kind, _, _, _, e in found)
        problems = []
        if not ended:
            e = counts.shape[0] - 1
            which = "done flag never ends" if len(b.done) == 1 else "done flags never end"
            problems.append((e, LogError(f"the {which} the last episode: its last {counts[-1]} rows "
                                         f"have no true value; expected true on the last row", file=f,
                                         key="+".join(b.done), episode=e, step=int(counts[-1]) - 1)))
        return counts, space, problems

    def _boundary(self, acc, kind, key, n_act, n_obs):
        """``(counts, space, ended)`` of one boundary array (``ended``: its last episode ends)."""
        f = self.path
        self._need(acc, key)
        if kind == "offsets":
            values = acc.read(key)             # one entry per episode: small
            if values.ndim == 1 and values.shape[0] and n_obs != n_act and values[-1] == n_obs:
                return bnd.counts_from_offsets(values, n_obs, file=f, key=key), "state", True
            return bnd.counts_from_offsets(values, n_act, file=f, key=key), "step", True
        shape = acc.shape(key)
        L = shape[0] if len(shape) == 1 else -1
        if L == n_act:
            space = "step"
        elif L == n_obs:
            space = "state"
        else:
            raise LogError(f"has shape {tuple(shape)}; expected ({n_act},) (one per action)"
                           + (f" or ({n_obs},) (one per observation)" if n_obs != n_act else ""),
                           file=f, key=key)
        if L == 0:
            raise LogError("expected a non-empty boundary array, got 0 rows", file=f, key=key)
        blocks = self._blocks(acc, key, L)
        if kind == "episode_id":
            return bnd.counts_from_id_blocks(blocks, file=f, key=key), space, True
        counts, ended = bnd.counts_from_done_blocks(blocks, file=f, key=key)
        return counts, space, ended

    def _check_step_arrays(self, acc, n_act):
        k, f = self.layout.keys, self.path
        for role, what in (("reward", "rewards"), ("success", "success flags"), ("task_goal", "goals"),
                           ("termination", "termination flags"), ("time_limit", "time-limit flags")):
            key = getattr(k, role)
            if key is None:
                continue
            self._need(acc, key)
            if role in FLAG_COLUMNS:
                if acc.dtype(key).kind not in "biuf":
                    raise LogError(f"expected a bool or 0/1 flag, got dtype {acc.dtype(key)}", file=f, key=key)
            else:
                checks.numeric(acc.dtype(key), file=f, key=key)
            rows, width = checks.rows_2d(acc.shape(key), file=f, key=key, what=what)
            if rows != n_act or (role != "task_goal" and width != 1):
                raise LogError(f"has shape {acc.shape(key)}; expected ({n_act},"
                               f"{' G' if role == 'task_goal' else ''}) (one row per action)",
                               file=f, key=key)
        if k.frame is not None:
            self._need(acc, k.frame)
            shape, dt = acc.shape(k.frame), acc.dtype(k.frame)
            want = int(self.state_rows.sum())
            if dt != np.uint8 or len(shape) not in (3, 4) or shape[0] != want:
                raise LogError(f"has dtype {dt} and shape {shape}; expected uint8 frames of shape "
                               f"({want}, H, W[, C]) (one per state, T+1 per episode)", file=f, key=k.frame)

    def _tasks(self, acc, n_act, E) -> list:
        key, f = self.layout.keys.task, self.path
        self.task_of = None
        if key is None:
            return []
        self._need(acc, key)
        shape = acc.shape(key)
        if shape == ():
            self.task_of = np.full(E, checks.task_value(acc.read(key), file=f, key=key), dtype=np.int64)
            return []
        if len(shape) != 1 or shape[0] not in (n_act, E):
            raise LogError(f"has shape {tuple(shape)}; expected ({n_act},) (one per action), ({E},) "
                           f"(one per episode) or a scalar", file=f, key=key)
        checks.task_dtype(acc.dtype(key), file=f, key=key)
        problems = []
        if shape[0] == E and E != n_act:
            per = acc.read(key)                  # one per episode
        else:
            # one per action row: the episode's value is its first row's; read block by block
            per, first_change = None, {}
            ends = self.step_start + self.step_rows
            for i, block in enumerate(self._blocks(acc, key, n_act)):
                lo = i * BLOCK_ROWS
                if per is None:
                    per = np.zeros(E, dtype=block.dtype)
                here = np.flatnonzero((self.step_start >= lo) & (self.step_start < lo + block.shape[0])
                                      & (self.step_rows > 0))
                per[here] = block[self.step_start[here] - lo]
                rows = np.arange(lo, lo + block.shape[0])
                ep = np.searchsorted(self.step_start, rows, side="right") - 1
                inside = (ep >= 0) & (rows < ends[np.maximum(ep, 0)])
                bad = np.flatnonzero(inside & (block != per[np.maximum(ep, 0)]))
                eps_bad, first = np.unique(ep[bad], return_index=True)
                for e, r in zip(eps_bad.tolist(), bad[first].tolist()):   # one per bad episode
                    first_change.setdefault(e, lo + r)
            for e, row in sorted(first_change.items()):
                problems.append((e, LogError("expected one task id per episode, the value changes",
                                             file=f, key=key, episode=e, step=int(row - self.step_start[e]))))
        per_row = not (shape[0] == E and E != n_act)
        self.task_of = checks.task_ids(per, file=f, key=key,
                                       locate=lambda e: {"episode": e, "step": 0 if per_row else None})
        return problems

    def known_task_ids(self) -> np.ndarray | None:
        """The task id of every kept episode, read while opening; None without a task key."""
        return None if self.task_of is None else self.task_of[self.episode_ids]

    # ---- read -------------------------------------------------------------------------------
    def _read_episodes(self, ids):
        k = self.layout.keys
        T = self.steps_all[ids]
        with self._access() as acc:
            def gather(key, starts, counts):
                lo = int(starts.min())
                hi = int((starts + counts).max())
                block = acc.read(key, lo, hi)
                if int(counts.sum()) == hi - lo and np.array_equal(starts[1:], (starts + counts)[:-1]):
                    return block  # the ranges tile the slice (episodes back to back): no gather
                return block[ranges_index(starts - lo, counts)]

            # runs of consecutive episodes keep the covering slice small when some are skipped
            runs = np.split(np.arange(ids.shape[0]), np.flatnonzero(np.diff(ids) != 1) + 1)
            pieces = {}
            for run in runs:
                rid = ids[run]
                try:
                    with guard(self.path, what="cannot read the log"):
                        part = self._read_run(gather, rid, self.steps_all[rid])
                except LogError as exc:
                    if exc.episode is None:      # a damaged block: say which episodes it holds
                        exc.message += (f" (reading episode {int(rid[0])})" if rid.shape[0] == 1 else
                                        f" (reading episodes {int(rid[0])} to {int(rid[-1])})")
                        exc.args = (exc.render(),)
                    raise
                for name, v in part.items():
                    pieces.setdefault(name, []).append(v)
            cols = {name: v[0] if len(v) == 1 else np.concatenate(v) for name, v in pieces.items()}
        for role, name in FLAG_COLUMNS.items():
            if getattr(k, role) is not None:
                cols[name] = self._flags(cols[name], _cumsum0(T), ids, getattr(k, role))
        if self.task_of is not None:
            cols["task_ids"] = self.task_of[ids]
        return cols

    def _read_run(self, gather, rid, T) -> dict:
        k, lay = self.layout.keys, self.layout
        out = {}
        s_start, o_start = self.step_start[rid], self.state_start[rid]
        if self.convention == "pairs":
            def side(keys):
                parts = [gather(key, o_start, T).reshape(int(T.sum()), -1) for key in keys]
                return parts[0] if len(parts) == 1 else np.concatenate(parts, axis=1)

            obs = side(lay.observation_keys())
            nxt = side(lay.next_observation_keys())
            found = checks.first_discontinuity(obs, nxt, T)
            if found is not None:
                raise checks.pairs_error(found[1], found[2], file=self.path, key=k.next_observation,
                                         episode=int(rid[found[0]]))
            last = nxt[np.cumsum(T) - 1]
            full = np.empty((obs.shape[0] + last.shape[0], self.obs_width), dtype=self.obs_dtype)
            final_row = np.zeros(full.shape[0], dtype=bool)
            final_row[_cumsum0(T + 1)[1:] - 1] = True
            full[~final_row] = obs
            full[final_row] = last
            out["observations"] = full
        else:
            parts = [gather(key, o_start, T + 1).reshape(int((T + 1).sum()), -1).astype(self.obs_dtype, copy=False)
                     for key in lay.observation_keys()]
            out["observations"] = parts[0] if len(parts) == 1 else np.concatenate(parts, axis=1)
        out["actions"] = gather(k.action, s_start, T).reshape(-1, self.action_width).astype(
            self.action_dtype, copy=False)
        if k.reward is not None:
            r = gather(k.reward, s_start, T).reshape(-1)
            out["rewards"] = r.astype(checks.float_dtype([r.dtype]), copy=False)
        for role, name in FLAG_COLUMNS.items():
            if getattr(k, role) is not None:
                out[name] = gather(getattr(k, role), s_start, T).reshape(-1)
        if k.task_goal is not None:
            g = gather(k.task_goal, s_start, T)
            g = g.reshape(g.shape[0], -1)
            out["task_goals"] = g.astype(checks.float_dtype([g.dtype]), copy=False)
        if k.frame is not None:
            out["frames"] = gather(k.frame, self.frame_start[rid], T + 1)
        return out

    def _flags(self, values, offsets, ids, key) -> np.ndarray:
        if values.dtype.kind == "b":
            return values
        bad = np.flatnonzero((values != 0) & (values != 1))
        if bad.size:
            pos = int(np.searchsorted(offsets[:-1], bad[0], side="right") - 1)
            raise LogError(f"expected a bool or 0/1 flag, got {values[bad[0]].item()!r}", file=self.path,
                           key=key, episode=int(ids[pos]),
                           step=int(bad[0] - offsets[pos]))
        return values != 0
