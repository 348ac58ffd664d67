"""Hindsight relabelling strategies: where the goal of each (transition, slot) comes from.

Every strategy is a plain function

``strategy(chunk, transitions, slots, seed, context=None, **options) -> StrategyGoals``

vectorised over the requested rows: ``transitions`` are transition indices into ``chunk``
(``0 .. chunk.num_transitions - 1``) and ``slots`` the goal slot of each row (same length).
Randomness comes only from :mod:`goalkit.rng`, addressed by
``(seed, episode id, step t, slot, stream)``, so a row's goal does not depend on which other
rows are asked for, on chunking or on worker count. A training sampler can therefore call
the same functions on a sampled minibatch (pass fresh slot numbers, or another seed, for
fresh goals).

Conventions, for transition ``t`` of an episode with ``T`` transitions (states
``s_0..s_T``; the goal reached by transition ``t`` is ``phi(s_{t+1})``):

==============  ====  =======================================================================
strategy        code  goal
==============  ====  =======================================================================
original        0     the log's own goal ``task_goals[t]`` (external vector, episode -1)
final           1     ``j = T``
future          2     ``j`` uniform on ``{t+1, ..., T}``
episode         3     ``j`` uniform on ``{0, ..., T}``
geometric       4     ``j = t + K``, ``K ~ Geometric(1 - gamma)`` on ``{1, 2, ...}`` (see below)
other_episode   5     a different episode of the same split, uniformly; ``j`` uniform on
                      ``{0, ..., T'}`` of that episode
neighbour       6     a later state of another episode joined through a neighbour of ``s_j``
library         7     a library target reached at ``s_j``, ``j > t`` (external)
near_miss       8     a state of another episode near ``s_j`` but beyond the threshold
==============  ====  =======================================================================

Codes 6-8 live in :mod:`goalkit.relabel.search_strategies` (conventions there) and need the goal search
and library that the build plan attaches to the context (:mod:`goalkit.pipeline.searchsetup`).

Geometric draws ``K`` by the inverse CDF ``K = max(1, ceil(log(1 - u) / log(gamma)))`` of one
uniform ``u``. ``past_end`` says what happens when ``t + K > T``:

* ``"clip"`` (default): ``j = T``; the probability mass beyond the end goes to the final state.
* ``"truncate"``: ``K`` is drawn from the geometric law conditioned on ``K <= T - t`` (inverse
  CDF of the truncated law, ``u`` scaled by ``1 - gamma**(T - t)``), so no goal piles up at
  the final state.

Adding a strategy
-----------------
Write a function with the signature above and give it one entry in the strategy table with
:func:`register`: its name, its code (stored in sets, never reused), the row rules a stored
row of it must satisfy (``verify`` checks them), the mixture options it reads and, for
strategies returning external vectors, a function giving their dimension.
:class:`goalkit.relabel.Mixture`, the ``[relabel]`` table, the build, ``verify``, the sampler and
the set's own code table (the ``strategy`` column's ``codes`` attribute) pick it up from that
one table. The audit (:mod:`goalkit.audit`) keeps its own, independent statement of the rules
and checks only the strategies it knows.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Callable

import numpy as np

from goalkit import rng
from goalkit.errors import StrategyError

if TYPE_CHECKING:  # annotations only: goalkit.logs loads the log readers (h5py)
    from goalkit.logs.episodes import EpisodeSet

#: Strategy name -> code stored in datasets (uint8, never renumbered); filled by :func:`register`
#: from the strategy table, so it always agrees with :data:`STRATEGIES`.
CODES: dict[str, int] = {}

#: Values of the geometric strategy's ``past_end`` option.
PAST_END = ("clip", "truncate")


@dataclass(frozen=True, eq=False)
class StrategyGoals:
    """Goals a strategy returns for M requested rows.

    Attributes
    ----------
    goal_episode : ndarray of int64 (M,)
        Episode id the goal state comes from, -1 for an external goal vector.
    goal_step : ndarray of int64 (M,)
        State index ``j`` in that episode (goal = ``phi(s_j)``), -1 when external.
    external : ndarray of float64 (M, G) or None
        Goal vectors, valid where ``goal_episode == -1``.
    hop_episode, hop_step : ndarray of int64 (M,) or None
        Intermediate state for neighbour goals; None (all -1) otherwise.
    join_step : ndarray of int64 (M,) or None
        Step of the transition's own episode the goal is joined at (neighbour, library,
        near_miss); None (all -1) otherwise.
    steps_to_goal : ndarray of int64 (M,) or None
        Overrides the mixture's default ``j - t`` rule when given (e.g. library goals).
    """

    goal_episode: np.ndarray
    goal_step: np.ndarray
    external: np.ndarray | None = None
    hop_episode: np.ndarray | None = None
    hop_step: np.ndarray | None = None
    join_step: np.ndarray | None = None
    steps_to_goal: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class StoredRows:
    """Stored goal rows as the row rules of the strategy table see them.

    Attributes
    ----------
    strategy : ndarray of uint8 (M,)
    ep, t : ndarray of int64 (M,)
        Source episode id and step.
    ge, j : ndarray of int64 (M,)
        Goal episode id and step (-1 when external).
    he, hs : ndarray of int64 (M,)
        Hop episode id and step (-1 when none).
    join : ndarray of int64 (M,)
        Join step (-1 when none).
    T : ndarray of int64 (M,)
        Transition count of the source episode.
    goal_T, hop_T : ndarray of int64 (M,)
        Transition count of the goal / hop episode (any value where there is none).
    """

    strategy: np.ndarray
    ep: np.ndarray
    t: np.ndarray
    ge: np.ndarray
    j: np.ndarray
    he: np.ndarray
    hs: np.ndarray
    join: np.ndarray
    T: np.ndarray
    goal_T: np.ndarray
    hop_T: np.ndarray

    @property
    def same(self) -> np.ndarray:
        """The goal is a state of the source episode."""
        return self.ge == self.ep

    @property
    def later_join(self) -> np.ndarray:
        """Joined at a later step of the source episode: ``t < join <= T``."""
        return (self.join > self.t) & (self.join <= self.T)


#: A row rule: ``(message, ok)`` with ``ok(rows: StoredRows) -> bool mask`` true where a row of
#: the strategy obeys it.
RowRule = tuple[str, Callable[[StoredRows], np.ndarray]]

#: Values of a table entry's ``join``: no join step, joined at a later step, or later / none.
JOINS = ("", "later", "later_or_none")


@dataclass(frozen=True)
class StrategySpec:
    """One entry of the strategy table.

    Attributes
    ----------
    name : str
        Name used in the ``[relabel.weights]`` table.
    code : int
        Code stored in datasets (see :data:`CODES`).
    func : callable
        The strategy function.
    options : tuple of str
        Mixture attributes passed to ``func`` as keyword arguments (e.g. ``("gamma",)``).
    external_dim : callable, optional
        ``external_dim(chunk, context) -> int`` for strategies returning external goal vectors.
    rules : tuple of RowRule
        What a stored row of this strategy must satisfy (checked by ``verify``).
    join : {"", "later", "later_or_none"}
        Whether its rows have a join step (``join_step``): none (-1), always at a later own step,
        or at a later own step or none.
    hops : bool
        Its rows may have a hop state (``hop_episode``, ``hop_step``).
    steps_from_join : bool
        ``steps_to_goal`` is ``join_step - t`` for joined rows (instead of ``j - t`` for later
        goals of the same episode).
    goal_table : bool
        It takes goals from other episodes (or matches library targets), so the build needs
        the goal table of every state.
    """

    name: str
    code: int
    func: Callable[..., StrategyGoals]
    options: tuple[str, ...] = ()
    external_dim: Callable[[EpisodeSet, object], int] | None = None
    rules: tuple = ()
    join: str = ""
    hops: bool = False
    steps_from_join: bool = False
    goal_table: bool = False


#: Registered strategies, by name.
STRATEGIES: dict[str, StrategySpec] = {}


def register(name: str, func, code: int, rules=(), options=(), external_dim=None, **flags) -> StrategySpec:
    """Add a strategy to the strategy table (:data:`STRATEGIES`, :data:`CODES`) and return its entry.

    Parameters
    ----------
    name : str
        Strategy name as written in ``[relabel.weights]``.
    func : callable
        ``func(chunk, transitions, slots, seed, context=None, **options) -> StrategyGoals``.
    code : int
        Code stored in sets, 0 .. 255; a code is never reused for another strategy.
    rules : sequence of RowRule
        ``(message, ok)`` pairs a stored row of the strategy must satisfy.
    options : sequence of str
        :class:`~goalkit.relabel.Mixture` attributes passed to ``func`` as keywords.
    external_dim : callable, optional
        ``external_dim(chunk, context) -> int`` if ``func`` returns external goal vectors.
    **flags
        ``join``, ``hops``, ``steps_from_join``, ``goal_table`` (see :class:`StrategySpec`).

    Returns
    -------
    StrategySpec

    Raises
    ------
    ValueError
        If the code is outside 0 .. 255 or belongs to another strategy, or ``join`` is unknown.
    """
    code = int(code)
    if not 0 <= code <= 255:
        raise ValueError(f"strategy codes are stored as uint8; got {code}")
    taken = {c: n for n, c in CODES.items()}
    if taken.get(code, name) != name:
        raise ValueError(f"code {code} belongs to strategy {taken[code]!r} (codes are never reused)")
    if flags.get("join", "") not in JOINS:
        raise ValueError(f"join must be one of {JOINS}, got {flags['join']!r}")
    spec = StrategySpec(name, code, func, tuple(options), external_dim, tuple(rules), **flags)
    STRATEGIES[name] = spec
    CODES[name] = code
    return spec


def unregister(name: str) -> None:
    """Remove a strategy from the table (for tests and plug-ins that add one temporarily)."""
    STRATEGIES.pop(name, None)
    CODES.pop(name, None)


def strategy_names() -> dict[int, str]:
    """Code -> name of every strategy in the table, in code order."""
    return {spec.code: spec.name for spec in sorted(STRATEGIES.values(), key=lambda sp: sp.code)}


# ---- helpers ---------------------------------------------------------------------------
def locate(chunk: EpisodeSet, transitions) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Locate transition indices of ``chunk``.

    Parameters
    ----------
    chunk : EpisodeSet
    transitions : array_like of int
        Indices ``0 .. chunk.num_transitions - 1``.

    Returns
    -------
    (position, episode_id, t, T) : tuple of int64 ndarrays
        Episode position in the chunk, its id, the step within it and its length.
    """
    transitions = np.asarray(transitions, dtype=np.int64)
    n = chunk.num_transitions
    if transitions.size and (transitions.min() < 0 or transitions.max() >= n):
        raise ValueError(f"transition indices must lie in 0..{n - 1}")
    pos = episode_positions(chunk.offsets, transitions)
    t = transitions - chunk.offsets[pos]
    length = chunk.offsets[pos + 1] - chunk.offsets[pos]
    return pos, np.asarray(chunk.episode_ids, dtype=np.int64)[pos], t, length


def episode_positions(offsets: np.ndarray, transitions: np.ndarray) -> np.ndarray:
    """Position of the episode holding each transition index: ``offsets[p] <= i < offsets[p+1]``.

    Same result as ``searchsorted(offsets, transitions, "right") - 1``; for sorted indices (as
    a build passes them) it is found by cutting the indices at the episode offsets instead,
    which costs a search per episode rather than per index.
    """
    transitions = np.asarray(transitions, dtype=np.int64)
    if transitions.size > 1 and bool(np.all(transitions[1:] >= transitions[:-1])):
        cut = np.searchsorted(transitions, offsets, side="left")
        return np.repeat(np.arange(len(offsets) - 1, dtype=np.int64), np.diff(cut))
    return np.searchsorted(offsets, transitions, side="right") - 1


def _slots(slots, transitions) -> np.ndarray:
    slots = np.asarray(slots, dtype=np.int64)
    if slots.shape != np.shape(transitions):
        raise ValueError("slots must have one entry per transition index")
    return slots


# ---- strategies ------------------------------------------------------------------------
def original(chunk: EpisodeSet, transitions, slots, seed: int, context=None) -> StrategyGoals:
    """The log's own goal of transition ``t`` (``chunk.task_goals[t]``), as an external vector.

    Raises
    ------
    StrategyError
        If the logs have no task goals (layout key ``task_goal``), naming the log file.
    """
    transitions = np.asarray(transitions, dtype=np.int64)
    _slots(slots, transitions)
    if chunk.task_goals is None:
        raise StrategyError("strategy 'original' needs the log's own goals, but the logs have none "
                            "(a layout maps them with task_goal in its [keys])", file=chunk.source or None)
    m = len(transitions)
    ext = np.asarray(chunk.task_goals, dtype=np.float64)
    ext = ext.reshape(len(ext), -1)[transitions]
    return StrategyGoals(np.full(m, -1, np.int64), np.full(m, -1, np.int64), ext)


def _task_goal_dim(chunk: EpisodeSet, context) -> int:
    if chunk.task_goals is None:
        original(chunk, np.zeros(0, np.int64), np.zeros(0, np.int64), 0)  # raises
    return int(np.asarray(chunk.task_goals).reshape(chunk.num_transitions, -1).shape[1])


def final(chunk: EpisodeSet, transitions, slots, seed: int, context=None) -> StrategyGoals:
    """The episode's last state: ``j = T``."""
    _slots(slots, transitions)
    _, eid, _, length = locate(chunk, transitions)
    return StrategyGoals(eid, length.copy())


def future(chunk: EpisodeSet, transitions, slots, seed: int, context=None) -> StrategyGoals:
    """A later state of the same episode: ``j`` uniform on ``{t+1, ..., T}`` (stream "goal")."""
    slots = _slots(slots, transitions)
    _, eid, t, length = locate(chunk, transitions)
    if len(t) == 0:
        return StrategyGoals(eid, t.copy())
    j = rng.integers(seed, t + 1, length + 1, eid, t, slots, "goal")
    return StrategyGoals(eid, j)


def episode(chunk: EpisodeSet, transitions, slots, seed: int, context=None) -> StrategyGoals:
    """Any state of the same episode: ``j`` uniform on ``{0, ..., T}`` (stream "goal")."""
    slots = _slots(slots, transitions)
    _, eid, t, length = locate(chunk, transitions)
    if len(t) == 0:
        return StrategyGoals(eid, t.copy())
    j = rng.integers(seed, 0, length + 1, eid, t, slots, "goal")
    return StrategyGoals(eid, j)


def geometric_offsets(u, gamma: float, room=None) -> np.ndarray:
    """Inverse CDF of Geometric(1 - gamma) on {1, 2, ...} at uniforms ``u`` in [0, 1).

    Parameters
    ----------
    u : array_like of float
        Uniforms on [0, 1).
    gamma : float
        In (0, 1); ``P(K = k) = (1 - gamma) * gamma**(k - 1)``.
    room : array_like of int, optional
        If given, draw from the law conditioned on ``K <= room`` (room >= 1).

    Returns
    -------
    ndarray of int64

    Examples
    --------
    >>> geometric_offsets([0.0, 0.5, 0.75, 0.7499], 0.5).tolist()
    [1, 1, 2, 2]
    """
    u = np.asarray(u, dtype=np.float64)
    log_g = np.log(gamma)
    if room is not None:
        room = np.asarray(room, dtype=np.int64)
        u = u * -np.expm1(room * log_g)  # u * (1 - gamma**room)
    k = np.ceil(np.log1p(-u) / log_g)
    # guard rounding at the bin edges: K is the smallest k with 1 - gamma**k >= u
    k = np.maximum(k, 1.0)
    if room is not None:
        k = np.minimum(k, room)
    return k.astype(np.int64)


def geometric(chunk: EpisodeSet, transitions, slots, seed: int, context=None, *,
              gamma: float = 0.9, past_end: str = "clip") -> StrategyGoals:
    """A later state at a geometric offset: ``j = t + K``, ``K ~ Geometric(1 - gamma)``.

    Parameters
    ----------
    gamma : float
        In (0, 1); the mean offset is ``1 / (1 - gamma)``.
    past_end : {"clip", "truncate"}
        ``"clip"``: ``j = min(t + K, T)``; ``"truncate"``: ``K`` conditioned on ``t + K <= T``.
    """
    slots = _slots(slots, transitions)
    if not 0.0 < gamma < 1.0:
        raise ValueError(f"gamma must lie in (0, 1), got {gamma}")
    if past_end not in PAST_END:
        raise ValueError(f"past_end must be one of {PAST_END}, got {past_end!r}")
    _, eid, t, length = locate(chunk, transitions)
    if len(t) == 0:
        return StrategyGoals(eid, t.copy())
    u = rng.uniform(seed, eid, t, slots, "goal")
    if past_end == "clip":
        j = np.minimum(t + geometric_offsets(u, gamma), length)
    else:
        j = t + geometric_offsets(u, gamma, room=length - t)
    return StrategyGoals(eid, j)


def other_episode(chunk: EpisodeSet, transitions, slots, seed: int, context=None) -> StrategyGoals:
    """A state of a different episode of the same split.

    The episode is uniform over the split's other episodes (stream "episode"), the state
    uniform on its ``{0, ..., T'}`` (stream "goal"). Needs ``context`` (a
    :class:`~goalkit.relabel.RelabelContext`).

    Raises
    ------
    StrategyError
        If a split has a single episode (there is no other episode to take a goal from).
    """
    slots = _slots(slots, transitions)
    if context is None:
        raise ValueError("other_episode needs a RelabelContext")
    _, eid, t, _ = locate(chunk, transitions)
    m = len(t)
    goal_ep = np.full(m, -1, np.int64)
    goal_step = np.full(m, -1, np.int64)
    if m == 0:
        return StrategyGoals(goal_ep, goal_step)
    codes = context.split_codes(eid)
    for code in np.unique(codes).tolist():  # loop over splits, not transitions
        rows = np.flatnonzero(codes == code)
        ids = context.split_episode_ids.get(code)
        if ids is None or not np.isin(eid[rows], ids).all():
            raise ValueError(f"episodes of split {code} missing from the context")
        lengths = context.split_lengths[code]
        n = len(ids)
        if n < 2:
            raise StrategyError(f"strategy 'other_episode' needs at least two episodes in each split; "
                                f"split {code} has {n}", file=chunk.source or None, episode=int(eid[rows[0]]))
        e, tt, ss = eid[rows], t[rows], slots[rows]
        own = np.searchsorted(ids, e)
        k = rng.integers(seed, 0, n - 1, e, tt, ss, "episode")
        k = k + (k >= own)  # skip the transition's own episode
        goal_ep[rows] = ids[k]
        goal_step[rows] = rng.integers(seed, 0, lengths[k] + 1, e, tt, ss, "goal")
    return StrategyGoals(goal_ep, goal_step)


# ---- the strategy table: codes 0-5 (6-8 in goalkit.relabel.search_strategies) -------------------------
register("original", original, 0, external_dim=_task_goal_dim, rules=[
    ("an original goal must be external (goal_episode -1)", lambda r: r.ge == -1)])
register("final", final, 1, rules=[
    ("a final goal must be the last state s_T of the same episode", lambda r: r.same & (r.j == r.T))])
register("future", future, 2, rules=[
    ("a future goal must come from the same episode strictly after the transition (t < j <= T)",
     lambda r: r.same & (r.j > r.t) & (r.j <= r.T))])
register("episode", episode, 3, rules=[
    ("an episode goal must come from the same episode (0 <= j <= T)",
     lambda r: r.same & (r.j >= 0) & (r.j <= r.T))])
register("geometric", geometric, 4, options=("gamma", "past_end"), rules=[
    ("a geometric-future goal must come from the same episode after the transition (t < j <= T)",
     lambda r: r.same & (r.t < r.j) & (r.j <= r.T))])
register("other_episode", other_episode, 5, goal_table=True, rules=[
    ("an other-episode goal must come from a different episode (0 <= j <= its length)",
     lambda r: (r.ge >= 0) & ~r.same & (r.j >= 0) & (r.j <= r.goal_T))])
