"""Goal masks in the audit: the row rule and the law of random masks, from docs/recipe.md.

Written a second time from the documentation, not taken from :mod:`goalkit.masks`:

* the mask of a row is the task table's mask of its source episode's task (``others`` for a
  task not in the table; every dimension without ``others``);
* a relabelled row (strategy code other than 0) instead gets, with probability
  ``random_share``, the union of a subset of the groups drawn uniformly from the non-empty
  subsets; groups are ``[mask] groups``, else one per goal field, else one per dimension.
"""

from __future__ import annotations

import numpy as np

from goalkit.audit.stattests import MIN_EXPECTED, Check, wait_for_scipy


class MaskAudit:
    """The recipe's ``[mask]`` table for a goal space, and the accumulated law of random masks.

    Parameters
    ----------
    table : dict
        The stored recipe's ``[mask]`` table.
    goal_dim : int
    field_widths : list of (str, int)
        The goal fields and their widths, in goal order (empty for a goal of indices or an
        embedding).
    """

    def __init__(self, table: dict, goal_dim: int, field_widths):
        self.goal_dim = goal_dim
        groups = [(str(k), [int(d) for d in v]) for k, v in dict(table.get("groups", {})).items()]
        if not groups and field_widths:
            at = 0
            for name, width in field_widths:
                groups.append((name, list(range(at, at + width))))
                at += width
        if not groups:
            groups = [(f"d{d}", [d]) for d in range(goal_dim)]
        self.groups = np.zeros((len(groups), goal_dim), dtype=bool)
        for k, (_, dims) in enumerate(groups):
            self.groups[k, dims] = True
        self.names = [n for n, _ in groups]

        def vector(entries):
            out = np.zeros(goal_dim, dtype=bool)
            for e in entries:
                out[self.groups[self.names.index(e)] if isinstance(e, str) else int(e)] = True
            return out

        self.others = np.ones(goal_dim, bool) if "others" not in table else vector(table["others"])
        self.tasks = {int(k): vector(v) for k, v in dict(table.get("tasks", {})).items()}
        self.share = float(table.get("random_share", 0.0))
        k = len(groups)
        self.observed = np.zeros(1 << k, np.int64)   # index 0: a mask that is not a union of groups
        self.expected = np.zeros(1 << k, np.float64)

    def task_masks(self, tasks) -> np.ndarray:
        """bool (M, G): the table's mask of each row's task id (-1: ``others``)."""
        out = np.tile(self.others, (len(tasks), 1))
        for tid, m in self.tasks.items():
            out[np.asarray(tasks) == tid] = m
        return out

    def union_codes(self, masks) -> np.ndarray:
        """int64 (M,): the subset code of each mask that is a union of groups, else 0."""
        inside = ~np.any(self.groups[None, :, :] & ~masks[:, None, :], axis=2)        # group k within mask
        code = (inside.astype(np.int64) << np.arange(len(self.names), dtype=np.int64)).sum(axis=1)
        union = (inside[:, :, None] & self.groups[None, :, :]).any(axis=1)
        return np.where(np.all(union == masks, axis=1), code, 0)

    def rules(self, stored, strategy, tasks):
        """Yield ``(rule, message, violating rows)`` for the stored ``goal_mask`` of a block,
        and add the relabelled rows to the law of random masks."""
        stored = np.asarray(stored) != 0
        expect = self.task_masks(tasks)
        is_task = np.all(stored == expect, axis=1)
        relabelled = np.asarray(strategy) != 0
        yield "goal_mask", "goal_mask is empty", ~stored.any(axis=1)
        if self.share == 0:
            yield "goal_mask", "goal_mask is not the task table's mask of the episode's task", ~is_task
            return
        codes = self.union_codes(stored)
        yield "goal_mask", "goal_mask of an original goal is not the task table's mask", ~relabelled & ~is_task
        yield "goal_mask", ("goal_mask of a relabelled goal is neither the task table's mask nor a union of "
                            "groups"), relabelled & ~is_task & (codes == 0)
        ok = relabelled & (is_task | (codes > 0))
        self.observed += np.bincount(codes[ok], minlength=len(self.observed))
        n_sub = len(self.observed) - 1
        self.expected[1:] += ok.sum() * self.share / n_sub
        task_codes = self.union_codes(expect[ok])
        self.expected += (1 - self.share) * np.bincount(task_codes, minlength=len(self.expected))

    def check(self) -> Check | None:
        """Chi-square test of the random-mask law on the relabelled rows (None when nothing to test)."""
        wait_for_scipy()
        from scipy import stats

        if self.share == 0 or self.observed.sum() == 0:
            return None
        exp, obs = self.expected.copy(), self.observed.astype(np.float64)
        small = exp < MIN_EXPECTED
        if small.any():   # merge bins expecting too few rows into one
            exp = np.append(exp[~small], exp[small].sum())
            obs = np.append(obs[~small], obs[small].sum())
            if exp[-1] == 0:
                exp, obs = exp[:-1], obs[:-1]
        if len(exp) < 2:
            return None
        res = stats.chisquare(obs, exp * obs.sum() / exp.sum())
        return Check("law of random goal masks", f"chi-square, {len(exp)} subsets of the groups",
                     float(res.statistic), float(res.pvalue),
                     detail=f"{int(obs.sum())} relabelled rows, random_share {self.share}")
