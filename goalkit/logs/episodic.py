"""Per-episode containers (an HDF5 group, a .npz file): check one episode's arrays, read it.

Shared by the grouped and per-file readers. :func:`plan_episode` looks at shapes and dtypes
only; :func:`read_episode` reads the arrays and normalises them to the EpisodeSet conventions
(``T + 1`` observation rows, ``T`` transition rows).

Observation conventions (decided per episode from the shapes, and required to agree across the
log):

* ``"T+1"``: observation has one row more than action (``s_0..s_T``);
* ``"pairs"``: ``next_observation`` is given; observation and next_observation have one row per
  action; ``s_0..s_{T-1}`` are observation's rows and ``s_T`` is next_observation's last row
  (the other rows must repeat the following observation, see
  :func:`goalkit.logs.checks.first_discontinuity`);
* ``"T"``: observation has as many rows as action; the last action (and reward, success, goal)
  has no following state and is dropped.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from goalkit.errors import LogError, shown
from goalkit.logs import checks
from goalkit.logs.source import BaseSource

CONVENTIONS = ("T+1", "pairs", "T")


@dataclass(frozen=True)
class EpisodeMeta:
    """What :func:`plan_episode` learnt about one episode without reading its data."""

    steps: int                      # T, transitions kept
    convention: str                 # one of CONVENTIONS
    obs_widths: tuple               # width of each observation key
    obs_dtypes: tuple
    action_width: int
    action_dtype: np.dtype
    goal_width: int | None
    frame_shape: tuple | None       # shape of one frame
    task: int | None

    def signature(self) -> tuple:
        """What must agree across episodes of one log."""
        return (self.convention, self.obs_widths, self.action_width, self.goal_width, self.frame_shape)


def _need(acc, key, episode):
    if not acc.has(key):
        names = acc.names()
        raise LogError(f"missing dataset; found: {', '.join(names) if names else 'nothing'}",
                       file=acc.file, key=acc.where(key), episode=episode)


def describe_signature(sig) -> str:
    conv, widths, a, g, fr = sig
    return (f"observations {conv} with widths {shown(list(widths))}, action width {a}"
            + (f", goal width {g}" if g is not None else "")
            + (f", frames {fr}" if fr is not None else ""))


def plan_episode(acc, layout, episode: int) -> EpisodeMeta:
    """Check one episode's shapes and dtypes against the layout.

    Parameters
    ----------
    acc : H5Access or NpzAccess
        The episode's arrays.
    layout : Layout
        The layout.
    episode : int
        The episode's position in the whole log (for messages).

    Raises
    ------
    LogError
        On a missing key, a wrong dtype or shape, lengths that disagree, or an empty episode.
    """
    k = layout.keys
    f = acc.file

    def where(key):
        return acc.where(key)

    _need(acc, k.action, episode)
    checks.numeric(acc.dtype(k.action), file=f, key=where(k.action), episode=episode)
    n, a_width = checks.rows_2d(acc.shape(k.action), file=f, key=where(k.action), episode=episode,
                                what="actions")
    widths, dtypes, obs_rows = [], [], []
    for key in layout.observation_keys():
        _need(acc, key, episode)
        dt = checks.numeric(acc.dtype(key), file=f, key=where(key), episode=episode)
        m, w = checks.rows_2d(acc.shape(key), file=f, key=where(key), episode=episode,
                              what="observations")
        widths.append(w)
        dtypes.append(dt)
        obs_rows.append((key, m))
    key0, m0 = obs_rows[0]
    for key, m in obs_rows[1:]:
        if m != m0:
            raise LogError(f"has {m} rows but field key {where(key0)} has {m0}; expected the same "
                           f"number of rows in every field", file=f, key=where(key), episode=episode)
    if k.next_observation is not None:
        for key, width in zip(layout.next_observation_keys(), widths):
            _need(acc, key, episode)
            checks.numeric(acc.dtype(key), file=f, key=where(key), episode=episode)
            m2, w2 = checks.rows_2d(acc.shape(key), file=f, key=where(key), episode=episode,
                                    what="next observations")
            if (m0, width) != (n, w2) or m2 != n:
                raise LogError(f"observation {(m0, width)}, next observation {(m2, w2)} and action "
                               f"({n}, ...) disagree; expected one row per action in both with equal "
                               f"widths", file=f, key=where(key), episode=episode)
            dtypes.append(acc.dtype(key))
        convention, steps = "pairs", n
    elif m0 == n + 1:
        convention, steps = "T+1", n
    elif m0 == n:
        convention, steps = "T", n - 1
    else:
        raise LogError(f"has {m0} rows and action has {n}; expected {n + 1} (one per state, "
                       f"T+1) or {n} (one per action, T)", file=f, key=where(key0), episode=episode)
    if steps <= 0:
        extra = " (with one observation per action the last action is dropped)" if convention == "T" else ""
        raise LogError(f"episode is empty: 0 transitions{extra}; expected at least 1",
                       file=f, key=where(k.action), episode=episode)

    def per_step(role, what):
        key = getattr(k, role)
        if key is None:
            return None
        _need(acc, key, episode)
        if role in ("success", "termination", "time_limit"):
            if acc.dtype(key).kind not in "biuf":
                raise LogError(f"expected a bool or 0/1 flag, got dtype {acc.dtype(key)}",
                               file=f, key=where(key), episode=episode)
        else:
            checks.numeric(acc.dtype(key), file=f, key=where(key), episode=episode)
        rows, width = checks.rows_2d(acc.shape(key), file=f, key=where(key), episode=episode, what=what)
        if rows != n:
            raise LogError(f"has {rows} rows, expected {n} (one per action)", file=f,
                           key=where(key), episode=episode)
        if role in ("reward", "success", "termination", "time_limit") and width != 1:
            raise LogError(f"expected shape ({n},), got {acc.shape(key)}", file=f, key=where(key),
                           episode=episode)
        return width

    per_step("reward", "rewards")
    per_step("success", "success flags")
    per_step("termination", "termination flags")
    per_step("time_limit", "time-limit flags")
    goal_width = per_step("task_goal", "goals")

    frame_shape = None
    if k.frame is not None:
        _need(acc, k.frame, episode)
        shape, dt = acc.shape(k.frame), acc.dtype(k.frame)
        if dt != np.uint8:
            raise LogError(f"expected uint8 frames, got dtype {dt}", file=f, key=where(k.frame),
                           episode=episode)
        if len(shape) not in (3, 4):
            raise LogError(f"expected frames of shape (T+1, H, W) or (T+1, H, W, C), got {shape}",
                           file=f, key=where(k.frame), episode=episode)
        if shape[0] != steps + 1:
            raise LogError(f"has {shape[0]} frames, expected {steps + 1} (one per state)", file=f,
                           key=where(k.frame), episode=episode)
        frame_shape = tuple(int(s) for s in shape[1:])

    task = None
    if k.task is not None:
        if acc.has(k.task):
            if acc.shape(k.task) not in ((), (1,), (n,)):
                raise LogError(f"expected a scalar task id or one per action ({n},), got shape "
                               f"{acc.shape(k.task)}", file=f, key=where(k.task), episode=episode)
            value = acc.read(k.task)
        else:
            value = acc.attr(k.task)
            if value is None:
                raise LogError("missing task id: no dataset or attribute of this name", file=f,
                               key=where(k.task), episode=episode)
        task = checks.task_value(value, file=f, key=where(k.task), episode=episode)
    return EpisodeMeta(steps=steps, convention=convention, obs_widths=tuple(widths),
                       obs_dtypes=tuple(dtypes), action_width=a_width,
                       action_dtype=np.dtype(acc.dtype(k.action)), goal_width=goal_width,
                       frame_shape=frame_shape, task=task)


def read_episode(acc, layout, meta: EpisodeMeta, episode: int, obs_dtype, action_dtype) -> dict:
    """Read one episode's arrays, normalised (observations ``(T+1, D)``, actions ``(T, A)``...)."""
    k = layout.keys
    T = meta.steps
    out = {}
    if meta.convention == "pairs":
        def side(keys, stop):
            parts = [acc.read(key, 0, stop).reshape(T, -1) for key in keys]
            return parts[0] if len(parts) == 1 else np.concatenate(parts, axis=1)

        obs = side(layout.observation_keys(), None)
        nxt = side(layout.next_observation_keys(), T)
        found = checks.first_discontinuity(obs, nxt, np.array([T]))
        if found is not None:
            raise checks.pairs_error(found[1], found[2], file=acc.file, key=acc.where(k.next_observation),
                                     episode=episode)
        last = nxt[T - 1:T]
        out["observations"] = np.concatenate([obs.astype(obs_dtype, copy=False),
                                              last.astype(obs_dtype, copy=False)])
    else:
        parts = [acc.read(key, 0, T + 1).reshape(T + 1, -1).astype(obs_dtype, copy=False)
                 for key in layout.observation_keys()]
        out["observations"] = parts[0] if len(parts) == 1 else np.concatenate(parts, axis=1)
    out["actions"] = acc.read(k.action, 0, T).reshape(T, -1).astype(action_dtype, copy=False)
    if k.reward is not None:
        r = acc.read(k.reward, 0, T).reshape(T)
        out["rewards"] = r.astype(checks.float_dtype([r.dtype]), copy=False)
    for role, name in (("success", "success"), ("termination", "terminations"), ("time_limit", "time_limits")):
        key = getattr(k, role)
        if key is not None:
            out[name] = checks.flags(acc.read(key, 0, T).reshape(T), file=acc.file, key=acc.where(key),
                                     episode=episode)
    if k.task_goal is not None:
        g = acc.read(k.task_goal, 0, T).reshape(T, -1)
        out["task_goals"] = g.astype(checks.float_dtype([g.dtype]), copy=False)
    if k.frame is not None:
        out["frames"] = acc.read(k.frame, 0, T + 1)
    return out


class EpisodicSource(BaseSource):
    """Base of readers whose episodes live in separate containers (groups, files)."""

    def _plan_all(self, accesses):
        """Plan every episode from its access object, in order.

        A per-episode problem is recorded (the episode's meta is None); a file-level one, or
        one raised while making the next access object, propagates.

        Returns
        -------
        (list, list)
            ``metas`` and ``problems`` for :meth:`_adopt`.
        """
        metas, problems = [], []
        for e, acc in enumerate(accesses):
            meta, problem = self._plan_access(acc, e)
            metas.append(meta)
            if problem is not None:
                problems.append((e, problem))
        return metas, problems

    def _plan_access(self, acc, e):
        """``(meta, None)`` or ``(None, LogError)`` of episode ``e`` from its access object (a
        file-level problem propagates)."""
        try:
            meta = plan_episode(acc, self.layout, e)
        except LogError as exc:
            if exc.episode is None:
                raise
            return None, exc
        self._planned(acc)
        return meta, None

    def _planned(self, acc) -> None:
        """Called with each episode's access object after it was planned (readers may look)."""

    def known_task_ids(self) -> np.ndarray | None:
        """The task id of every kept episode, as planned (nothing is read); None without a task key."""
        if self.layout.keys.task is None:
            return None
        return np.array([self.metas[e].task for e in self.episode_ids.tolist()], dtype=np.int64)

    def _adopt(self, metas, problems):
        """Check that episodes agree with the first good one, then apply the skip policy."""
        good = [m for m in metas if m is not None]
        if not good:
            self._settle(np.zeros(len(metas)), problems)  # raises, or "no usable episodes"
        ref = good[0]
        for e, m in enumerate(metas):
            if m is not None and m.signature() != ref.signature():
                first = next(i for i, x in enumerate(metas) if x is ref)
                problems.append((e, LogError(
                    f"has {describe_signature(m.signature())}; expected "
                    f"{describe_signature(ref.signature())} as in episode {first}",
                    file=self._file_of(e), episode=e)))
                metas[e] = None
        bad = {e for e, _ in problems}
        self.metas = metas
        self.convention = ref.convention
        self.obs_dtype = checks.float_dtype([d for m in good for d in m.obs_dtypes])
        self.action_dtype = np.result_type(*{m.action_dtype for m in good})
        self.action_width = ref.action_width
        self.obs_width = int(sum(ref.obs_widths))
        if self.layout.fields:
            edges = np.concatenate([[0], np.cumsum(ref.obs_widths)])
            self.fields = {name: (int(edges[i]), int(edges[i + 1]))
                           for i, (name, _) in enumerate(self.layout.fields)}
        if ref.convention == "T":
            self.notes.append("observations are stored one per action (T per episode): the last "
                              "action, reward and success flag of each episode are dropped")
        self._settle([0 if m is None or e in bad else m.steps for e, m in enumerate(metas)], problems)


def join_parts(parts: list[dict], tasks: list, layout) -> dict:
    """Concatenate per-episode column dicts into EpisodeSet columns."""
    cols = {name: np.concatenate([p[name] for p in parts]) for name in parts[0]}
    if layout.keys.task is not None:
        cols["task_ids"] = np.asarray(tasks, dtype=np.int64)
    return cols
