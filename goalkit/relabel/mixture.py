"""A mixture of relabelling strategies: every goal slot of a transition draws one by weight."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Mapping

import numpy as np

from goalkit import rng
from goalkit.config import check_keys, closest
from goalkit.errors import ParameterError, shown
from goalkit.relabel.strategies import CODES, PAST_END, STRATEGIES, locate

if TYPE_CHECKING:  # annotations only: goalkit.logs loads the log readers (h5py)
    from goalkit.logs.episodes import EpisodeSet

#: Keys of the recipe's ``[relabel]`` table.
#: Most goals per transition a recipe may ask for: the set has this many rows per logged
#: transition, so a larger number is almost surely a typo (and would fill the disk).
MAX_GOALS_PER_TRANSITION = 1024

TABLE_KEYS = ("goals_per_transition", "gamma", "past_end", "weights", "neighbours", "library", "recall",
              "index")

#: Values of the ``index`` key (see :class:`goalkit.goals.neighbours.IndexSettings`).
INDEX_METHODS = ("auto", "exact", "ivf", "hnsw")


def _bad(message: str, parameter: str | None = None) -> ParameterError:
    """A :class:`ParameterError` of :class:`Mixture`'s ``parameter``."""
    return ParameterError(message, owner="Mixture", parameter=parameter)


def _is_number(x) -> bool:
    return isinstance(x, (int, float, np.integer, np.floating)) and not isinstance(x, (bool, np.bool_))


@dataclass(frozen=True, eq=False)
class GoalRows:
    """Goal assignments of a chunk, one row per (transition, slot), sorted by (transition, slot).

    ``slot``, ``strategy`` and the goal-address fields (:data:`goalkit.rows.GOAL_ADDRESS`) are
    the stored columns of the same names (:data:`goalkit.rows.INDEX_FIELDS`); the builder copies
    them into the set by those names.

    Attributes
    ----------
    transition : ndarray of int64 (M,)
        Transition index within the chunk.
    slot : ndarray of int64 (M,)
        Goal slot, ``0 .. goals_per_transition - 1``.
    strategy : ndarray of uint8 (M,)
        Strategy code (see :data:`goalkit.relabel.CODES`).
    goal_episode : ndarray of int64 (M,)
        Episode id of the goal state; -1 when the goal is an external vector.
    goal_step : ndarray of int64 (M,)
        State index ``j`` of the goal (goal = ``phi(s_j)``); -1 when external.
    external : ndarray of float64 (M, G) or None
        External goal vectors, valid where ``goal_episode == -1`` (NaN elsewhere); None when
        no strategy of the mixture gives external goals.
    hop_episode, hop_step : ndarray of int64 (M,)
        Intermediate state of neighbour goals; -1 otherwise.
    steps_to_goal : ndarray of int64 (M,)
        ``j - t`` for a goal at a later state of the transition's own episode (``j > t``),
        and for a library target matched at step ``j > t``; -1 otherwise (other episodes,
        other external goals, and same-episode goals at or before ``s_t``, to which the log
        shows no path).
    join_step : ndarray of int64 (M,) or None
        Step ``j`` of the own episode a neighbour, library or near-miss goal is joined at;
        -1 for other strategies (filled with -1 when omitted).
    """

    transition: np.ndarray
    slot: np.ndarray
    strategy: np.ndarray
    goal_episode: np.ndarray
    goal_step: np.ndarray
    external: np.ndarray | None
    hop_episode: np.ndarray
    hop_step: np.ndarray
    steps_to_goal: np.ndarray
    join_step: np.ndarray | None = None

    def __post_init__(self):
        if self.join_step is None:
            object.__setattr__(self, "join_step", np.full(len(self.transition), -1, np.int64))

    def __len__(self) -> int:
        return int(self.transition.shape[0])


@dataclass(frozen=True)
class Mixture:
    """Weights over strategies plus their options; the recipe's ``[relabel]`` table.

    Parameters
    ----------
    weights : mapping of str to float
        Strategy name -> weight (>= 0, not all zero); normalised to probabilities.
    goals_per_transition : int, default 4
        Goal slots per transition (>= 1); each slot draws its strategy independently.
    gamma : float, default 0.9
        Discount of the geometric strategy, in (0, 1).
    past_end : {"clip", "truncate"}, default "clip"
        Geometric offsets past the episode's end (see :mod:`goalkit.relabel.strategies`).
    neighbours : int, default 10
        ``k`` of the neighbour and near-miss strategies (candidates per join state).
    library : str or None
        Goal library file (``.npy`` / ``.npz``) of the library strategy.
    recall : float, default 0.95
        Target recall@k of an approximate neighbour index, in (0, 1].
    index : {"auto", "exact", "ivf", "hnsw"}, default "auto"
        Neighbour index kind (``auto``: exact up to 50,000 states per split, IVF above).

    Examples
    --------
    >>> import numpy as np
    >>> from goalkit.logs.episodes import EpisodeSet
    >>> from goalkit.relabel import Mixture, RelabelContext
    >>> ep = EpisodeSet(observations=np.zeros((5, 2)), actions=np.zeros((4, 1)),
    ...                 offsets=np.array([0, 4]), episode_ids=np.array([0]))
    >>> rows = Mixture({"final": 1.0}, goals_per_transition=2).assign(ep, 0, RelabelContext.from_lengths([4]))
    >>> rows.goal_step.tolist(), rows.steps_to_goal.tolist()
    ([4, 4, 4, 4, 4, 4, 4, 4], [4, 4, 3, 3, 2, 2, 1, 1])
    """

    weights: Mapping[str, float] = field(default_factory=lambda: {"future": 1.0})
    goals_per_transition: int = 4
    gamma: float = 0.9
    past_end: str = "clip"
    neighbours: int = 10
    library: str | None = None
    recall: float = 0.95
    index: str = "auto"

    def __post_init__(self):
        object.__setattr__(self, "weights", dict(self.weights))
        self._validate()

    # ---- checking ----------------------------------------------------------------------
    def _validate(self) -> None:
        if not isinstance(self.weights, Mapping) or not self.weights:
            raise _bad("expected strategy name -> weight, at least one entry; strategies: "
                       f"{', '.join(STRATEGIES)}", "weights")
        for name, w in self.weights.items():
            parameter = f"weights.{name}"
            if name not in STRATEGIES:
                hint = closest(str(name), STRATEGIES)
                tip = f"; did you mean '{hint}'?" if hint else ""
                raise _bad(f"unknown strategy '{name}'{tip} valid: {', '.join(STRATEGIES)}", parameter)
            if not _is_number(w) or not math.isfinite(w):
                raise _bad(f"expected a finite number >= 0, got {shown(w)}", parameter)
            if w < 0:
                raise _bad(f"expected a weight >= 0, got {shown(w)}", parameter)
        if not any(w > 0 for w in self.weights.values()):
            raise _bad("all strategy weights are zero; give at least one a weight > 0", "weights")
        g = self.goals_per_transition
        if (isinstance(g, (bool, np.bool_)) or not isinstance(g, (int, np.integer))
                or not 1 <= g <= MAX_GOALS_PER_TRANSITION):
            raise _bad(f"expected an integer from 1 to {MAX_GOALS_PER_TRANSITION}, got {shown(g)}",
                       "goals_per_transition")
        if not _is_number(self.gamma) or not 0.0 < self.gamma < 1.0:
            raise _bad(f"expected a number strictly between 0 and 1, got {shown(self.gamma)}", "gamma")
        if self.past_end not in PAST_END:
            hint = closest(str(self.past_end), PAST_END)
            tip = f"; did you mean '{hint}'?" if hint else ""
            raise _bad(f"unknown past_end {self.past_end!r}{tip} valid: {', '.join(PAST_END)}", "past_end")
        k = self.neighbours
        if isinstance(k, (bool, np.bool_)) or not isinstance(k, (int, np.integer)) or not 1 <= k <= 1024:
            raise _bad(f"expected an integer from 1 to 1024, got {shown(k)}", "neighbours")
        if not _is_number(self.recall) or not 0.0 < self.recall <= 1.0:
            raise _bad(f"expected a recall in (0, 1], got {shown(self.recall)}", "recall")
        if self.index not in INDEX_METHODS:
            hint = closest(str(self.index), INDEX_METHODS)
            tip = f"; did you mean '{hint}'?" if hint else ""
            raise _bad(f"unknown index {self.index!r}{tip} valid: {', '.join(INDEX_METHODS)}", "index")
        if self.library is not None and (not isinstance(self.library, str) or not self.library):
            raise _bad(f"expected the path of a .npy or .npz file, got {self.library!r}", "library")
        if self.weights.get("library", 0) > 0 and self.library is None:
            raise _bad("strategy 'library' needs target goals: give library, the path of an .npy/.npz "
                       "file of targets (goal vectors)", "library")

    @classmethod
    def from_table(cls, table: Mapping[str, Any]) -> "Mixture":
        """Build a mixture from a mapping of its parameters, as in the recipe's ``[relabel]`` table.

        Missing keys take the defaults of :class:`Mixture` (weights ``{future = 1}``).

        Raises
        ------
        ParameterError
            On an unknown parameter or strategy name (lists the valid ones and the closest), a
            negative, non-numeric or all-zero weight, ``gamma`` outside (0, 1),
            ``goals_per_transition`` not an integer from 1 to 1024, an unknown ``past_end`` or
            ``index``, ``neighbours`` outside 1 .. 1024, ``recall`` outside (0, 1], a weighted
            ``library`` strategy without a ``library`` file. The recipe loader re-raises it
            naming the recipe file and key.
        """
        if not isinstance(table, Mapping):
            raise _bad(f"expected a table of parameter -> value, got {table!r}")
        check_keys(table, TABLE_KEYS, file=None, section="[relabel]",
                   error=lambda message, file=None, key=None: _bad(message, key))
        kwargs = {k: table[k] for k in TABLE_KEYS if k in table}
        if "weights" in kwargs and not isinstance(kwargs["weights"], Mapping):
            raise _bad(f"expected a table [relabel.weights] of strategy name -> weight, got "
                       f"{shown(kwargs['weights'])}", "weights")
        return cls(**kwargs)

    def describe(self) -> dict:
        """Return a JSON-able description (the ``[relabel]`` table that rebuilds this mixture)."""
        out = {"weights": {k: float(v) for k, v in self.weights.items()},
               "goals_per_transition": int(self.goals_per_transition),
               "gamma": float(self.gamma), "past_end": self.past_end,
               "neighbours": int(self.neighbours), "recall": float(self.recall), "index": self.index}
        if self.library is not None:
            out["library"] = self.library
        return out

    # ---- assignment --------------------------------------------------------------------
    def _active(self) -> list[tuple[str, float]]:
        """Strategies with positive weight, in code order (independent of the table's order)."""
        names = sorted((n for n, w in self.weights.items() if w > 0), key=lambda n: CODES[n])
        return [(n, float(self.weights[n])) for n in names]

    def probabilities(self) -> dict[str, float]:
        """Return strategy name -> probability of a slot drawing it."""
        active = self._active()
        total = sum(w for _, w in active)
        return {n: w / total for n, w in active}

    def draw_strategies(self, episode_ids, steps, slots, seed: int) -> np.ndarray:
        """Return the strategy code (uint8) of each (episode id, step, slot) address.

        One uniform per address from stream "strategy", mapped through the cumulative
        probabilities of the active strategies in code order.
        """
        active = self._active()
        cum = np.cumsum([w for _, w in active])
        cum = cum / cum[-1]
        codes = np.array([CODES[n] for n, _ in active], dtype=np.uint8)
        u = rng.uniform(seed, episode_ids, steps, slots, "strategy")
        pick = np.minimum(np.searchsorted(cum, u, side="right"), len(active) - 1)
        return codes[pick]

    def assign(self, chunk: EpisodeSet, seed: int, context=None, transitions=None, slots=None) -> GoalRows:
        """Assign ``goals_per_transition`` goals to every transition of ``chunk``.

        Parameters
        ----------
        chunk : EpisodeSet
            Whole episodes.
        seed : int
            The build's seed.
        context : RelabelContext, optional
            Needed by ``other_episode``, ``neighbour``, ``near_miss`` and ``library``.
        transitions : ndarray of int64, optional
            Transition indices (into ``chunk``) to relabel, e.g. a sampled minibatch; all
            transitions when omitted. Rows come out sorted by (transition, slot) when the
            indices are sorted.
        slots : ndarray of int64, optional
            Goal slots of each transition (aligned with ``transitions``; per-source goal counts):
            transition ``i`` gets slots ``0 .. slots[i] - 1``, each drawn exactly as with a
            uniform count, so slot ``j`` of a transition is the same row whatever its count.
            Default: ``goals_per_transition`` for every transition.

        Returns
        -------
        GoalRows
            Identical rows for a transition whatever chunk it is assigned in.
        """
        if transitions is None:
            transitions = np.arange(chunk.num_transitions, dtype=np.int64)
        transitions = np.asarray(transitions, dtype=np.int64)
        if slots is None:
            p = int(self.goals_per_transition)
            tr = np.repeat(transitions, p)
            slot = np.tile(np.arange(p, dtype=np.int64), len(transitions))
        else:
            counts = np.asarray(slots, dtype=np.int64)
            tr = np.repeat(transitions, counts)
            first = np.cumsum(counts) - counts
            slot = np.arange(len(tr), dtype=np.int64) - np.repeat(first, counts)
        _, eid, t, _ = locate(chunk, tr)
        strategy = self.draw_strategies(eid, t, slot, seed)
        m = len(tr)
        goal_ep = np.full(m, -1, np.int64)
        goal_step = np.full(m, -1, np.int64)
        hop_ep = np.full(m, -1, np.int64)
        hop_step = np.full(m, -1, np.int64)
        join_step = np.full(m, -1, np.int64)
        steps_override = np.zeros(m, bool)
        steps_given = np.full(m, -1, np.int64)
        external = None
        active = [STRATEGIES[n] for n, _ in self._active()]
        ext_dims = [s.external_dim(chunk, context) for s in active if s.external_dim is not None]
        if ext_dims:
            if len(set(ext_dims)) != 1:
                raise ValueError(f"external goal strategies disagree on the goal dimension: {ext_dims}")
            external = np.full((m, ext_dims[0]), np.nan)
        for spec in active:  # loop over strategies, not transitions
            rows = np.flatnonzero(strategy == spec.code)
            if rows.size == 0:
                continue
            opts = {name: getattr(self, name) for name in spec.options}
            got = spec.func(chunk, tr[rows], slot[rows], seed, context, **opts)
            goal_ep[rows] = got.goal_episode
            goal_step[rows] = got.goal_step
            if got.external is not None:
                ext_rows = got.goal_episode == -1
                external[rows[ext_rows]] = got.external[ext_rows]
            if got.hop_episode is not None:
                hop_ep[rows] = got.hop_episode
                hop_step[rows] = got.hop_step
            if got.join_step is not None:
                join_step[rows] = got.join_step
            if got.steps_to_goal is not None:
                steps_override[rows] = True
                steps_given[rows] = got.steps_to_goal
        same = (goal_ep == eid) & (goal_step > t)
        steps_to_goal = np.where(same, goal_step - t, -1).astype(np.int64)
        steps_to_goal = np.where(steps_override, steps_given, steps_to_goal)
        return GoalRows(tr, slot, strategy, goal_ep, goal_step, external, hop_ep, hop_step,
                        steps_to_goal, join_step)
