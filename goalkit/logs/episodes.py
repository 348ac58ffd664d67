"""The EpisodeSet: flat columns plus int64 episode offsets (the CSR idiom).

Indexing conventions (pinned by tests):

* An episode with ``T`` transitions has states ``s_0 .. s_T`` and actions ``a_0 .. a_{T-1}``;
  transition ``t`` is ``(s_t, a_t, s_{t+1})``.
* ``offsets`` has ``E + 1`` entries; episode ``e`` owns transitions
  ``offsets[e] .. offsets[e + 1] - 1`` of every transition-level column.
* State-level columns (observations, frames) hold ``T + 1`` rows per episode; episode ``e``'s
  state ``t`` is row ``offsets[e] + e + t`` (see :meth:`EpisodeSet.state_offsets`).
* ``episode_ids`` are stable: an episode's id is its position in the whole log, whatever
  chunk it is read in, so per-episode randomness does not depend on chunking.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterator, Mapping, Protocol

import numpy as np


@dataclass(frozen=True)
class EpisodeSet:
    """A batch of whole episodes as flat arrays.

    Parameters
    ----------
    observations : ndarray, shape (N + E, D)
        States ``s_0..s_T`` of every episode, concatenated (float).
    actions : ndarray, shape (N, A)
        Actions of every transition, concatenated.
    offsets : ndarray of int64, shape (E + 1,)
        Transition offsets; ``offsets[0] == 0`` and ``offsets[-1] == N``.
    episode_ids : ndarray of int64, shape (E,)
        Stable episode ids (position in the whole log).
    rewards : ndarray, shape (N,), optional
        The log's own task reward of each transition.
    success : ndarray of bool, shape (N,), optional
        The log's own success flag of each transition (true once the task is done).
    task_ids : ndarray of int64, shape (E,), optional
        The task of each episode.
    task_goals : ndarray, shape (N, G), optional
        The log's own goal for each transition, in goal space.
    frames : ndarray of uint8, shape (N + E, H, W) or (N + E, H, W, C), optional
        Camera frames aligned with the states.
    terminations : ndarray of bool, shape (N,), optional
        The environment's termination flag of each transition: true when ``s_{t+1}`` is a
        terminal state of the environment (only on an episode's last transition).
    time_limits : ndarray of bool, shape (N,), optional
        The environment's time-limit (truncation) flag of each transition: true when the episode
        was cut after it (only on an episode's last transition). Never a terminal.
    sources : ndarray of int16, shape (E,), optional
        The log source (its code in the recipe's ``[[sources]]``) of each episode.
    fields : mapping of str to (int, int)
        Named observation fields and their column range ``[start, stop)``.
    source : str
        Where the episodes came from, for messages.
    """

    observations: np.ndarray
    actions: np.ndarray
    offsets: np.ndarray
    episode_ids: np.ndarray
    rewards: np.ndarray | None = None
    success: np.ndarray | None = None
    task_ids: np.ndarray | None = None
    task_goals: np.ndarray | None = None
    frames: np.ndarray | None = None
    terminations: np.ndarray | None = None
    time_limits: np.ndarray | None = None
    sources: np.ndarray | None = None
    fields: Mapping[str, tuple[int, int]] = field(default_factory=dict)
    source: str = ""

    # ---- sizes -------------------------------------------------------------------------
    @property
    def num_episodes(self) -> int:
        """Number of episodes ``E``."""
        return int(self.offsets.shape[0] - 1)

    @property
    def num_transitions(self) -> int:
        """Number of transitions ``N``."""
        return int(self.offsets[-1])

    @property
    def lengths(self) -> np.ndarray:
        """Transitions per episode, int64 array of shape (E,)."""
        return np.diff(self.offsets)

    def state_offsets(self) -> np.ndarray:
        """Offsets of state-level columns: ``offsets + arange(E + 1)``."""
        return self.offsets + np.arange(self.offsets.shape[0], dtype=np.int64)

    # ---- per-transition index helpers (vectorised) -------------------------------------
    def transition_episode(self) -> np.ndarray:
        """Episode position (0..E-1, not id) of every transition, int64 shape (N,)."""
        return np.repeat(np.arange(self.num_episodes, dtype=np.int64), self.lengths)

    def transition_step(self) -> np.ndarray:
        """Step ``t`` within its episode of every transition, int64 shape (N,)."""
        ep = self.transition_episode()
        return np.arange(self.num_transitions, dtype=np.int64) - self.offsets[ep]

    def state_row(self, episode_pos, step) -> np.ndarray:
        """Row of state ``step`` of episode position ``episode_pos`` in state-level columns."""
        episode_pos = np.asarray(episode_pos, dtype=np.int64)
        return self.offsets[episode_pos] + episode_pos + np.asarray(step, dtype=np.int64)

    def next_state_rows(self) -> np.ndarray:
        """Row of ``s_{t+1}`` for every transition, int64 shape (N,)."""
        return np.arange(self.num_transitions, dtype=np.int64) + self.transition_episode() + 1

    def current_state_rows(self) -> np.ndarray:
        """Row of ``s_t`` for every transition, int64 shape (N,)."""
        return np.arange(self.num_transitions, dtype=np.int64) + self.transition_episode()

    def position_of(self, episode_id) -> np.ndarray:
        """Position of each episode id in this set (ids must be present)."""
        episode_id = np.asarray(episode_id, dtype=np.int64)
        order = np.argsort(self.episode_ids, kind="stable")
        pos = np.searchsorted(self.episode_ids[order], episode_id)
        pos = np.clip(pos, 0, len(order) - 1)
        found = order[pos]
        if not np.all(self.episode_ids[found] == episode_id):
            missing = episode_id[self.episode_ids[found] != episode_id]
            raise KeyError(f"episode ids not in this set: {missing[:5].tolist()}")
        return found

    def select(self, start: int, stop: int) -> "EpisodeSet":
        """Return episodes at positions ``start .. stop - 1`` as a new EpisodeSet (views)."""
        a, b = int(self.offsets[start]), int(self.offsets[stop])
        sa, sb = a + start, b + stop  # state rows are offsets + position
        def cut(x, lo, hi):
            return None if x is None else x[lo:hi]
        return EpisodeSet(
            observations=self.observations[sa:sb],
            actions=self.actions[a:b],
            offsets=self.offsets[start:stop + 1] - a,
            episode_ids=self.episode_ids[start:stop],
            rewards=cut(self.rewards, a, b),
            success=cut(self.success, a, b),
            task_ids=cut(self.task_ids, start, stop),
            task_goals=cut(self.task_goals, a, b),
            frames=cut(self.frames, sa, sb),
            terminations=cut(self.terminations, a, b),
            time_limits=cut(self.time_limits, a, b),
            sources=cut(self.sources, start, stop),
            fields=dict(self.fields),
            source=self.source,
        )


class LogSource(Protocol):
    """A task log opened for reading a chunk of episodes at a time.

    Readers in :mod:`goalkit.logs` return objects with this interface; nothing downstream
    knows the file format.

    Attributes
    ----------
    path : str
        The log's path (for messages and provenance).
    lengths : ndarray of int64, shape (E,)
        Transitions per episode, known without reading the bulk data.
    fields : mapping of str to (int, int)
        Named observation fields.

    The readers of :func:`goalkit.logs.open_logs` also provide ``files`` (list of str, every
    file read, for checksums), ``episode_ids`` (int64 (E,), each kept episode's position in the
    whole log; equal to ``arange(E)`` when nothing was skipped), ``notes`` (list of str) and
    ``skipped`` (list of (episode, reason)).
    """

    path: str
    lengths: np.ndarray
    fields: Mapping[str, tuple[int, int]]

    def read(self, start: int, stop: int) -> EpisodeSet:
        """Read kept episodes at positions ``start .. stop - 1``.

        Their ids are ``episode_ids[start:stop]`` (``start .. stop - 1`` when nothing was skipped).
        """
        ...


def chunk_bounds(lengths: np.ndarray, max_transitions: int) -> list[tuple[int, int]]:
    """Split episodes into consecutive chunks of at most ``max_transitions`` transitions.

    An episode longer than ``max_transitions`` gets a chunk of its own. Every episode is in
    exactly one chunk, in order.

    Examples
    --------
    >>> chunk_bounds(np.array([3, 3, 3, 10, 1]), 6)
    [(0, 2), (2, 3), (3, 4), (4, 5)]
    """
    lengths = np.asarray(lengths, dtype=np.int64)
    bounds, start, total = [], 0, 0
    for e, n in enumerate(lengths.tolist()):  # loop over episodes, not transitions
        if e > start and total + n > max_transitions:
            bounds.append((start, e))
            start, total = e, 0
        total += n
    if start < len(lengths):
        bounds.append((start, len(lengths)))
    return bounds


def iter_chunks(source: LogSource, max_transitions: int = 1_000_000) -> Iterator[EpisodeSet]:
    """Yield the log's episodes as EpisodeSets of at most ``max_transitions`` transitions each."""
    for start, stop in chunk_bounds(source.lengths, max_transitions):
        yield source.read(start, stop)


def concat_episodes(parts: "list[EpisodeSet]") -> EpisodeSet:
    """Concatenate EpisodeSets of whole episodes, in order, into one.

    Examples
    --------
    >>> a = EpisodeSet(observations=np.zeros((3, 1)), actions=np.zeros((2, 1)),
    ...                offsets=np.array([0, 2]), episode_ids=np.array([4]))
    >>> concat_episodes([a, a]).offsets.tolist()
    [0, 2, 4]
    """
    if len(parts) == 1:
        return parts[0]

    def cat(name):
        vals = [getattr(p, name) for p in parts]
        return None if vals[0] is None else np.concatenate(vals)

    lengths = np.concatenate([p.lengths for p in parts])
    return EpisodeSet(
        observations=cat("observations"), actions=cat("actions"),
        offsets=np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64),
        episode_ids=cat("episode_ids"), rewards=cat("rewards"), success=cat("success"),
        task_ids=cat("task_ids"), task_goals=cat("task_goals"), frames=cat("frames"),
        terminations=cat("terminations"), time_limits=cat("time_limits"), sources=cat("sources"),
        fields=dict(parts[0].fields), source=parts[0].source)


def consecutive_runs(positions) -> list[tuple[int, int]]:
    """Index ranges ``(a, b)`` into sorted ``positions`` over which the positions are consecutive.

    Examples
    --------
    >>> consecutive_runs(np.array([2, 3, 4, 9, 11, 12]))
    [(0, 3), (3, 4), (4, 6)]
    """
    positions = np.asarray(positions)
    if positions.size == 0:
        return []
    breaks = np.flatnonzero(np.diff(positions) != 1) + 1
    starts = np.concatenate([[0], breaks])
    stops = np.concatenate([breaks, [positions.size]])
    return list(zip(starts.tolist(), stops.tolist()))


def kept_task_ids(source, max_transitions: int) -> np.ndarray | None:
    """The task id of every kept episode of ``source``, in order; None when its log has none.

    A reader that learnt them while opening the log (every per-episode reader does: the task
    id is checked to be constant per episode when the log is planned) says so through a
    ``known_task_ids()`` method, and nothing is read. Any other source is read once, chunk by
    chunk of at most ``max_transitions`` transitions.

    Examples
    --------
    >>> from goalkit.logs.memory import MemorySource
    >>> log = MemorySource(EpisodeSet(observations=np.zeros((7, 1)), actions=np.zeros((5, 1)),
    ...                               offsets=np.array([0, 3, 5]), episode_ids=np.array([0, 1]),
    ...                               task_ids=np.array([4, 9])))
    >>> kept_task_ids(log, 2).tolist()
    [4, 9]
    """
    known = getattr(source, "known_task_ids", None)
    if known is not None:
        return known()
    return read_task_ids(source, max_transitions)


def read_task_ids(source, max_transitions: int) -> np.ndarray | None:
    """The task id of every kept episode of ``source``, read chunk by chunk; None when it has none."""
    seen = [source.read(a, b).task_ids for a, b in chunk_bounds(source.lengths, max_transitions)]
    if not seen or seen[0] is None:
        return None
    return np.concatenate(seen).astype(np.int64, copy=False)
