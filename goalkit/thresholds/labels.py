"""Where labelled pairs come from: a labelled-pairs file, or the logs' own success flags.

A labelled pair is ``(achieved, goal, reached)``: a reached goal ``phi(s_{t+1})``, a goal,
and whether a person (or the task's own success signal) counts it as reached; plus the
episode it comes from, so the bootstrap can resample episodes.

Labelled-pairs file
-------------------
``.npz`` with arrays

=============  =============  ==================================================
key            shape          meaning
=============  =============  ==================================================
``achieved``   (M, G) float   the reached goal of each pair
``goal``       (M, G) float   the goal it is compared with
``reached``    (M,) 0/1/bool  1 = counts as reached
``episode``    (M,) int       optional: episode of each pair (bootstrap groups)
=============  =============  ==================================================

``.csv`` with a header line naming columns ``achieved_0 .. achieved_{G-1}``,
``goal_0 .. goal_{G-1}``, ``reached`` and optionally ``episode``, in any order, comma
separated; other columns are refused. Without ``episode`` each pair is its own group.
Errors name the file, the key or column, and the row (``.npz``: 0-based row; ``.csv``:
1-based line of the file, the header being line 1).
"""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from goalkit.errors import LabelError
from goalkit.logs.episodes import EpisodeSet, iter_chunks

#: Array keys of a labelled-pairs .npz file.
NPZ_KEYS = ("achieved", "goal", "reached", "episode")


@dataclass(frozen=True)
class LabelledPairs:
    """Labelled pairs in goal space.

    Attributes
    ----------
    achieved, goal : ndarray of float64, shape (M, G)
    reached : ndarray of bool, shape (M,)
    groups : ndarray of int64, shape (M,)
        Episode of each pair (the pair's row when the source has no episodes).
    grouped : bool
        Whether ``groups`` are real episodes.
    source : str
        Where the pairs came from, for messages.
    mask : ndarray of uint8, shape (M, G), or None
        The goal dimensions each pair is scored on: its episode's task mask when the recipe
        has a ``[mask]`` table (:meth:`goalkit.masks.GoalMasks.task_mask`); None: every one.
    """

    achieved: np.ndarray
    goal: np.ndarray
    reached: np.ndarray
    groups: np.ndarray
    grouped: bool
    source: str = ""
    mask: np.ndarray | None = None

    @property
    def size(self) -> int:
        """Number of pairs."""
        return int(self.reached.shape[0])

    @property
    def dim(self) -> int:
        """Goal dimension ``G``."""
        return int(self.achieved.shape[1])

    def describe(self) -> dict:
        """JSON-able summary."""
        return {"source": self.source, "pairs": self.size, "dim": self.dim,
                "reached": int(self.reached.sum()), "grouped": self.grouped,
                "episodes": int(np.unique(self.groups).size) if self.grouped else None,
                "masked": self.mask is not None}

    def with_mask(self, mask) -> "LabelledPairs":
        """These pairs scored on the goal dimensions of ``mask`` (uint8 (M, G), or None)."""
        if mask is not None:
            mask = np.asarray(mask, dtype=np.uint8)
            if mask.shape != self.achieved.shape:
                raise ValueError(f"expected a mask of shape {self.achieved.shape}, got {mask.shape}")
        return LabelledPairs(self.achieved, self.goal, self.reached, self.groups, self.grouped,
                             self.source, mask)


def concat_pairs(parts: Sequence[LabelledPairs]) -> LabelledPairs:
    """Concatenate labelled pairs (e.g. from several chunks of one log)."""
    if not parts:
        raise LabelError("no labelled pairs to combine")
    return LabelledPairs(
        achieved=np.concatenate([p.achieved for p in parts]),
        goal=np.concatenate([p.goal for p in parts]),
        reached=np.concatenate([p.reached for p in parts]),
        groups=np.concatenate([p.groups for p in parts]),
        grouped=all(p.grouped for p in parts),
        source=parts[0].source,
        mask=None if any(p.mask is None for p in parts) else np.concatenate([p.mask for p in parts]))


# ---- checking shared by both file kinds --------------------------------------------------
def _show(x) -> str:
    """A value as the user wrote it: 3 rather than np.int64(3), 2.0 for a float."""
    return repr(x.item() if isinstance(x, np.generic) else x)


def _check_pairs(achieved, goal, reached, episode, *, file, where) -> LabelledPairs:
    """Check arrays; ``where(i)`` turns a row index into the message prefix."""
    a = achieved
    if a.ndim != 2 or a.shape[0] == 0 or a.shape[1] == 0:
        raise LabelError(f"expected a non-empty 2-D array (pairs, goal dimensions), got shape {a.shape}",
                         file=file, key="achieved")
    if goal.shape != a.shape:
        raise LabelError(f"expected shape {a.shape} (like achieved), got {goal.shape}", file=file, key="goal")
    m = a.shape[0]
    for key, arr in (("achieved", a), ("goal", goal)):
        bad = np.flatnonzero(~np.isfinite(arr).all(axis=1))
        if bad.size:
            raise LabelError(f"{where(bad[0])}: expected finite numbers", file=file, key=key)
    if reached.shape != (m,):
        raise LabelError(f"expected shape ({m},) (one flag per pair), got {reached.shape}", file=file,
                         key="reached")
    r = reached.astype(np.float64)
    bad = np.flatnonzero((r != 0) & (r != 1))
    if bad.size:
        raise LabelError(f"{where(bad[0])}: expected 0 or 1, got {_show(reached[bad[0]])}", file=file,
                         key="reached")
    if episode is None:
        groups, grouped = np.arange(m, dtype=np.int64), False
    else:
        if episode.shape != (m,):
            raise LabelError(f"expected shape ({m},) (one episode per pair), got {episode.shape}",
                             file=file, key="episode")
        e = episode.astype(np.float64)
        bad = np.flatnonzero(~np.isfinite(e) | (e != np.round(e)))
        if bad.size:
            raise LabelError(f"{where(bad[0])}: expected an integer episode id, got {_show(episode[bad[0]])}",
                             file=file, key="episode")
        groups, grouped = e.astype(np.int64), True
    return LabelledPairs(np.asarray(a, dtype=np.float64), np.asarray(goal, dtype=np.float64),
                         r.astype(bool), groups, grouped, str(file))


def load_labelled_pairs(path) -> LabelledPairs:
    """Read a labelled-pairs file (.npz or .csv, see the module docstring).

    Raises
    ------
    LabelError
        Naming the file, key or column and row, when the file is missing, unreadable, or
        does not hold what is expected.
    """
    path = Path(path)
    if not path.exists():
        raise LabelError("file not found", file=path)
    suffix = path.suffix.lower()
    if suffix == ".npz":
        return _load_npz(path)
    if suffix == ".csv":
        return _load_csv(path)
    raise LabelError(f"expected a .npz or .csv labelled-pairs file, got '{path.suffix}'", file=path)


def _load_npz(path: Path) -> LabelledPairs:
    try:
        with np.load(path, allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
    except Exception as exc:  # zipfile / format errors of every kind
        raise LabelError(f"cannot read as .npz ({exc})", file=path) from None
    extra = sorted(set(arrays) - set(NPZ_KEYS))
    if extra:
        raise LabelError(f"unknown array '{extra[0]}'; expected keys: {', '.join(NPZ_KEYS)}", file=path,
                         key=extra[0])
    for key in NPZ_KEYS[:3]:
        if key not in arrays:
            raise LabelError(f"missing array; expected keys: {', '.join(NPZ_KEYS)} (episode optional)",
                             file=path, key=key)
    for key, arr in arrays.items():
        if arr.dtype.kind not in "biuf":
            raise LabelError(f"expected a numeric array, got dtype {arr.dtype}", file=path, key=key)
    return _check_pairs(arrays["achieved"].astype(np.float64), arrays["goal"].astype(np.float64),
                        arrays["reached"], arrays.get("episode"), file=path,
                        where=lambda i: f"row {int(i)}")


_COLUMN = re.compile(r"^(achieved|goal)_(\d+)$")


def _load_csv(path: Path) -> LabelledPairs:
    try:
        with path.open(newline="", encoding="utf-8") as fh:
            header = next(csv.reader(fh), None)
    except (OSError, UnicodeDecodeError) as exc:
        raise LabelError(f"cannot read as UTF-8 text ({exc})", file=path) from None
    if not header:
        raise LabelError("empty file; expected a header line of column names", file=path)
    header = [h.strip() for h in header]
    cols: dict[str, dict[int, int]] = {"achieved": {}, "goal": {}}
    special: dict[str, int] = {}
    for pos, name in enumerate(header):  # loop over columns
        m = _COLUMN.match(name)
        if m:
            cols[m.group(1)][int(m.group(2))] = pos
        elif name in ("reached", "episode") and name not in special:
            special[name] = pos
        else:
            raise LabelError(f"unexpected column '{name}' (or repeated); expected achieved_0.., goal_0.., "
                             f"reached, episode (optional)", file=path, key=name)
    if "reached" not in special:
        raise LabelError("missing column", file=path, key="reached")
    for kind in ("achieved", "goal"):
        idx = sorted(cols[kind])
        if not idx or idx != list(range(len(idx))):
            missing = next((i for i in range(len(idx) + 1) if i not in cols[kind]), 0)
            raise LabelError(f"missing column; expected {kind}_0 .. {kind}_{{G-1}} without gaps",
                             file=path, key=f"{kind}_{missing}")
    if len(cols["achieved"]) != len(cols["goal"]):
        raise LabelError(f"expected as many goal_ columns as achieved_ columns "
                         f"({len(cols['achieved'])}), got {len(cols['goal'])}", file=path, key="goal")
    try:
        table = np.loadtxt(path, delimiter=",", skiprows=1, dtype=np.float64, ndmin=2,
                           encoding="utf-8")
    except ValueError:
        _raise_bad_cell(path, header)
        raise  # pragma: no cover - _raise_bad_cell always raises
    if table.shape[0] == 0:
        raise LabelError("no rows after the header line", file=path)
    if table.shape[1] != len(header):
        _raise_bad_cell(path, header)
    g = len(cols["achieved"])
    pick = lambda kind: table[:, [cols[kind][i] for i in range(g)]]  # noqa: E731
    episode = table[:, special["episode"]] if "episode" in special else None
    return _check_pairs(pick("achieved"), pick("goal"), table[:, special["reached"]], episode,
                        file=path, where=lambda i: f"line {int(i) + 2}")


def _raise_bad_cell(path: Path, header: list[str]) -> None:
    """Find the first cell that is not a number (error path only) and raise naming it."""
    with path.open(newline="", encoding="utf-8") as fh:
        reader = csv.reader(fh)
        next(reader)
        for line, row in enumerate(reader, start=2):  # error path: a scan of the text
            if len(row) != len(header):
                raise LabelError(f"line {line}: expected {len(header)} values, got {len(row)}", file=path)
            for name, cell in zip(header, row):
                try:
                    float(cell)
                except ValueError:
                    raise LabelError(f"line {line}: expected a number, got {cell!r}", file=path,
                                     key=name) from None
    raise LabelError("cannot parse the rows as numbers", file=path)


# ---- labels from the logs themselves -----------------------------------------------------
def pairs_from_success(episodes: EpisodeSet, goal_map, masks=None) -> LabelledPairs:
    """Label every transition by the log's own success flag against the log's task goal.

    Transition ``t`` gives the pair ``(phi(s_{t+1}), task_goal[t])`` labelled ``success[t]``;
    its group is the episode id. With ``masks`` (:class:`goalkit.masks.GoalMasks`) each pair
    carries its episode's task mask (episodes without a task id: the table's ``others``).

    Parameters
    ----------
    episodes : EpisodeSet
        Must carry ``task_goals`` (N, G) and ``success`` (N,).
    goal_map : GoalMap
        ``phi``; its ``dim`` must equal the task goals' width.

    Raises
    ------
    LabelError
        If the logs have no task goals or no success flags, or the widths differ.
    """
    src = episodes.source or None
    if episodes.task_goals is None:
        raise LabelError("the logs carry no task goals (layout key task_goal); labels from the logs "
                         "need them", file=src, key="task_goal")
    if episodes.success is None:
        raise LabelError("the logs carry no success flags (layout key success); labels from the logs "
                         "need them", file=src, key="success")
    tg = np.asarray(episodes.task_goals, dtype=np.float64)
    if tg.ndim == 1:
        tg = tg[:, None]
    if tg.shape[1] != goal_map.dim:
        raise LabelError(f"expected task goals of width {goal_map.dim} (the goal map's dimension), got "
                         f"{tg.shape[1]}", file=src, key="task_goal")
    achieved = goal_map(episodes, episodes.next_state_rows())
    ep = episodes.transition_episode()
    groups = episodes.episode_ids[ep].astype(np.int64)
    mask = None
    if masks is not None:
        tasks = (np.full(ep.size, -1, np.int64) if episodes.task_ids is None
                 else np.asarray(episodes.task_ids, dtype=np.int64)[ep])
        mask = masks.task_mask(tasks)
    return LabelledPairs(achieved, tg, np.asarray(episodes.success).astype(bool), groups, True,
                         episodes.source, mask)


def pairs_from_logs(source, goal_map, *, max_transitions: int = 1_000_000, progress=None,
                    masks=None) -> LabelledPairs:
    """:func:`pairs_from_success` over a whole :class:`~goalkit.logs.episodes.LogSource`, by chunks.

    ``progress``, if given, is called with the number of transitions of each chunk read.
    """
    parts = []
    for chunk in iter_chunks(source, max_transitions):  # a loop over chunks
        parts.append(pairs_from_success(chunk, goal_map, masks))
        if progress is not None:
            progress(chunk.num_transitions)
    return concat_pairs(parts)
