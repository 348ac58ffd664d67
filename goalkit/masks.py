"""Goal masks: which goal dimensions a goal row constrains (partial goals).

A goal mask is a per-row vector of 0/1 over the goal dimensions, stored beside the goal as the
``goal_mask`` column; the reward rule scores only the dimensions it keeps
(:func:`goalkit.reward.score`). Goal spaces that are projections of the state are the goal map
m: S -> G of Andrychowicz et al. (2017); a mask projects further, per row, onto a subset of
named state variables, as in the goal hierarchies of Levy et al. (2019, HAC) and in goal-set
hindsight relabelling (Velez Garcia et al., 2026, cited as the issue gives it, not checked).

Where a row's mask comes from (the recipe's ``[mask]`` table, docs/recipe.md):

1. the task table ``tasks``: the source episode's task id -> the groups or goal dimensions
   that task constrains; tasks not in the table get ``others`` (default: every dimension);
2. named groups of goal dimensions: ``groups`` (name -> goal dimension numbers), or, when
   none are given and the goal is made of layout fields, one group per goal field, or else
   one group per goal dimension (named ``d0``, ``d1``, ...);
3. random masks: a relabelled row (any strategy but ``original``) gets, with probability
   ``random_share``, a random mask in place of 1-2: the union of a subset of the groups drawn
   uniformly from the ``2**K - 1`` non-empty subsets of the ``K`` groups. Both draws are pure
   functions of (seed, source episode id, step, slot, stream) (:mod:`goalkit.rng`), so masks
   do not depend on chunking or workers.

With no ``[mask]`` table no mask is stored and every dimension counts (today's rules).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np

from goalkit import rng
from goalkit.config import closest
from goalkit.errors import ParameterError

#: Keys of the recipe's ``[mask]`` table.
MASK_KEYS = ("groups", "tasks", "others", "random_share")
#: Most groups a random mask draws from (2**K - 1 subsets).
MAX_RANDOM_GROUPS = 16
#: The strategy code of the log's own goals, which never get random masks.
ORIGINAL_CODE = 0

_Entry = Any  # a group name (str) or a goal dimension number (int)


@dataclass(frozen=True)
class MaskSpec:
    """The ``[mask]`` table as written, before it is matched with a goal space.

    Attributes
    ----------
    groups : tuple of (str, tuple of int)
        Named groups of goal dimensions, in table order (empty: from the goal's fields).
    tasks : tuple of (int, tuple)
        Task id -> the group names and goal dimension numbers it constrains.
    others : tuple or None
        The mask of tasks not in ``tasks`` (None: every dimension).
    random_share : float
        Probability that a relabelled row gets a random mask.
    """

    groups: tuple = ()
    tasks: tuple = ()
    others: tuple | None = None
    random_share: float = 0.0

    @classmethod
    def from_table(cls, table: Mapping[str, Any]) -> "MaskSpec":
        """Check and read the recipe's ``[mask]`` table.

        Raises
        ------
        ParameterError
            Naming ``MaskSpec`` and the table's key (``tasks.<id>``, ``groups.<name>``; the
            recipe loader maps it to the file and ``mask.<key>``): an unknown key, a task id that is not a whole number, an empty mask or group,
            an entry that is neither a name nor a dimension number, or a ``random_share``
            outside [0, 1]. Names and dimension numbers are checked against the goal space
            by :meth:`resolve`.
        """
        if not isinstance(table, Mapping):
            raise _bad(f"expected a table, got {table!r}")
        for key in table:
            if key not in MASK_KEYS:
                hint = closest(str(key), MASK_KEYS)
                tip = f"; did you mean '{hint}'?" if hint else ""
                raise _bad(f"unknown key '{key}' in [mask]{tip} valid keys: {', '.join(MASK_KEYS)}", str(key))
        groups = []
        raw_groups = table.get("groups", {})
        if not isinstance(raw_groups, Mapping):
            raise _bad(f"expected a table of name = [dimension numbers], got {raw_groups!r}", "groups")
        for name, dims in raw_groups.items():
            key = f"groups.{name}"
            if not isinstance(dims, list) or not all(_is_index(d) for d in dims):
                raise _bad(f"expected a list of goal dimension numbers (>= 0), got {dims!r}", key)
            if not dims:
                raise _bad("expected at least one goal dimension, got an empty group", key)
            groups.append((str(name), tuple(int(d) for d in dims)))
        tasks = []
        raw_tasks = table.get("tasks", {})
        if not isinstance(raw_tasks, Mapping):
            raise _bad(f"expected a table of task id = [groups or dimensions], got {raw_tasks!r}", "tasks")
        for task, entries in raw_tasks.items():
            key = f"tasks.{task}"
            try:
                tid = int(str(task), 10)
            except ValueError:
                raise _bad(f"expected a task id (a whole number) as the key, got {task!r}", key) from None
            tasks.append((tid, _entries(entries, key)))
        others = None if "others" not in table else _entries(table["others"], "others")
        share = table.get("random_share", 0.0)
        if (isinstance(share, bool) or not isinstance(share, (int, float)) or not math.isfinite(share)
                or not 0.0 <= share <= 1.0):
            raise _bad(f"expected a probability from 0 to 1, got {share!r}", "random_share")
        return cls(tuple(groups), tuple(tasks), others, float(share))

    def describe(self) -> dict:
        """A JSON-able description (the table as written)."""
        return {"groups": {n: list(d) for n, d in self.groups},
                "tasks": {str(t): list(e) for t, e in self.tasks},
                "others": None if self.others is None else list(self.others),
                "random_share": self.random_share}

    def resolve(self, goal_dim: int, field_groups: Sequence[tuple[str, tuple[int, ...]]] = (),
                task_ids=None) -> "GoalMasks":
        """Match the table with a goal space and the logs' tasks.

        Parameters
        ----------
        goal_dim : int
            The goal map's dimension ``G``.
        field_groups : sequence of (str, tuple of int)
            The goal's own named groups (one per goal field), used when the table has none.
        task_ids : array_like of int, optional
            Every task id of the logs (None: the logs have no task ids).

        Raises
        ------
        ParameterError
            Naming ``MaskSpec`` and the table's key (the build maps it to ``mask.<key>``): a group dimension outside ``0 .. G-1``, an entry naming an
            unknown group or dimension, a task the logs do not have (or logs without task ids),
            or more than :data:`MAX_RANDOM_GROUPS` groups for random masks.
        """
        groups = list(self.groups) or list(field_groups) or [(f"d{d}", (d,)) for d in range(goal_dim)]
        for name, dims in groups:
            bad = [d for d in dims if d >= goal_dim]
            if bad:
                raise _bad(f"goal dimension {bad[0]} does not exist; the goal has {goal_dim} (0 .. {goal_dim - 1})",
                           f"groups.{name}")
        by_name = dict(groups)

        def vector(entries, key) -> np.ndarray:
            out = np.zeros(goal_dim, dtype=np.uint8)
            for e in entries:
                if isinstance(e, str):
                    if e not in by_name:
                        raise _bad(f"unknown goal dimension group {e!r}; groups are: {', '.join(by_name)}", key)
                    out[list(by_name[e])] = 1
                elif e >= goal_dim:
                    raise _bad(f"goal dimension {e} does not exist; the goal has {goal_dim} (0 .. {goal_dim - 1})",
                               key)
                else:
                    out[e] = 1
            return out

        known = None if task_ids is None else set(np.asarray(task_ids, dtype=np.int64).tolist())
        ids, rows = [], []
        for tid, entries in self.tasks:
            key = f"tasks.{tid}"
            if known is None:
                raise _bad("the mask table names tasks, but the logs have no task ids (map them with task in the "
                           "layout's [keys])", key)
            if tid not in known:
                raise _bad(f"task {tid} is not in the logs; their tasks are: "
                           f"{', '.join(str(t) for t in sorted(known)) or '(none)'}", key)
            ids.append(tid)
            rows.append(vector(entries, key))
        others = (np.ones(goal_dim, np.uint8) if self.others is None else vector(self.others, "others"))
        if self.random_share > 0 and len(groups) > MAX_RANDOM_GROUPS:
            raise _bad(f"random masks draw from at most {MAX_RANDOM_GROUPS} groups, the goal has {len(groups)}; "
                       "name fewer groups in [mask] groups", "random_share")
        order = np.argsort(np.asarray(ids, dtype=np.int64), kind="stable")
        table = (np.stack(rows) if rows else np.zeros((0, goal_dim), np.uint8))[order]
        group_matrix = np.zeros((len(groups), goal_dim), dtype=np.uint8)
        for k, (_, dims) in enumerate(groups):
            group_matrix[k, list(dims)] = 1
        return GoalMasks(goal_dim, tuple(n for n, _ in groups), group_matrix,
                         np.asarray(ids, dtype=np.int64)[order], table, others, self.random_share)


def _is_index(x) -> bool:
    return isinstance(x, int) and not isinstance(x, bool) and x >= 0


def _bad(message: str, parameter: str | None = None) -> ParameterError:
    """A problem with the ``[mask]`` table's ``parameter`` (None: the whole table)."""
    return ParameterError(message, owner="MaskSpec", parameter=parameter)


def _entries(entries, key) -> tuple:
    if not isinstance(entries, list) or not all(isinstance(e, str) or _is_index(e) for e in entries):
        raise _bad(f"expected a list of group names and goal dimension numbers, got {entries!r}", key)
    if not entries:
        raise _bad("expected at least one group or goal dimension, got an empty mask", key)
    return tuple(entries)


@dataclass(frozen=True, eq=False)
class GoalMasks:
    """A mask table matched with a goal space: computes the ``goal_mask`` column.

    Attributes
    ----------
    goal_dim : int
    group_names : tuple of str
        The groups random masks draw from, in order (bit ``k`` of a draw is group ``k``).
    group_matrix : ndarray of uint8 (K, G)
    task_ids : ndarray of int64 (T,)
        Tasks of the table, sorted.
    task_masks : ndarray of uint8 (T, G)
    others : ndarray of uint8 (G,)
        The mask of every other task (and of episodes without a task id).
    random_share : float
    """

    goal_dim: int
    group_names: tuple
    group_matrix: np.ndarray
    task_ids: np.ndarray
    task_masks: np.ndarray
    others: np.ndarray
    random_share: float = 0.0

    def task_mask(self, tasks) -> np.ndarray:
        """The table's mask, uint8 (M, G), of each row's task id (-1 or unknown: ``others``)."""
        tasks = np.asarray(tasks, dtype=np.int64)
        out = np.broadcast_to(self.others, (len(tasks), self.goal_dim)).copy()
        if len(self.task_ids):
            at = np.minimum(np.searchsorted(self.task_ids, tasks), len(self.task_ids) - 1)
            hit = self.task_ids[at] == tasks
            out[hit] = self.task_masks[at[hit]]
        return out

    def random_draws(self, seed: int, episode, step, slot) -> tuple[np.ndarray, np.ndarray]:
        """The two draws of random masks: (takes a random mask, bool (M,); subset code, int64 (M,)).

        The subset code ``c`` in ``1 .. 2**K - 1`` keeps group ``k`` iff bit ``k`` of ``c`` is set.
        """
        use = rng.uniform(seed, episode, step, slot, "mask") < self.random_share
        k = len(self.group_names)
        code = rng.integers(seed, 1, 1 << k, episode, step, slot, "mask_set")
        return use, code

    def subset_mask(self, codes) -> np.ndarray:
        """The union of the groups of subset codes ``codes``, uint8 (M, G)."""
        codes = np.asarray(codes, dtype=np.int64)
        bits = (codes[:, None] >> np.arange(len(self.group_names), dtype=np.int64)) & 1
        return (bits.astype(np.uint8) @ self.group_matrix > 0).astype(np.uint8)

    def row_masks(self, seed: int, episode, step, slot, strategy, tasks) -> np.ndarray:
        """The ``goal_mask`` column of goal rows, uint8 (M, G).

        Parameters
        ----------
        seed : int
        episode, step, slot : array_like of int (M,)
            Each row's source episode id, step and goal slot.
        strategy : array_like of int (M,)
            Strategy codes (code 0, ``original``, never gets a random mask).
        tasks : array_like of int (M,)
            The source episode's task id (-1 when the logs have none).
        """
        out = self.task_mask(tasks)
        if self.random_share > 0 and len(out):
            use, code = self.random_draws(seed, episode, step, slot)
            use &= np.asarray(strategy) != ORIGINAL_CODE
            if use.any():
                out[use] = self.subset_mask(code[use])
        return out

    def describe(self) -> dict:
        """A JSON-able description for the build summary and reports."""
        return {"groups": {n: np.flatnonzero(r).tolist() for n, r in zip(self.group_names, self.group_matrix)},
                "tasks": {str(int(t)): np.flatnonzero(m).tolist() for t, m in zip(self.task_ids, self.task_masks)},
                "others": np.flatnonzero(self.others).tolist(), "random_share": self.random_share}


def field_groups(goal_fields: Sequence[str], fields: Mapping[str, tuple[int, int]]) -> list:
    """One group per goal field: (name, the goal dimensions it fills), in goal order."""
    out, at = [], 0
    for name in goal_fields:
        a, b = fields[name]
        out.append((name, tuple(range(at, at + b - a))))
        at += b - a
    return out
