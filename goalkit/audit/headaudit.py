"""The audit of a set built with goal heads (``[output] goals = "heads"``), written apart from the builder.

For every head of the stored recipe (:class:`goalkit.audit.recipe_text.AuditHead`) and every
audited row it checks the documented rules (docs/dataset.md, "Goal heads in a built set"):
the source is one the head weights; the goal address obeys the source's rule (``current``
``j = t``, ``final`` ``j = T``, ``subgoal`` ``j = min(t + k, T)``, ``future`` / ``geometric``
``t < j <= T``, ``episode`` ``0 <= j <= T``, ``random`` a state of an episode of the same
split); ``steps_to_goal`` is ``j - t`` for a state ``j >= t`` of the own episode and -1
otherwise; the goal is phi of that state, read from the logs; distance, reached, reward and
terminal follow the reward table; the labels follow the head's own ``gamma``. It then tests
the draws: each source's share (exact binomial), the future / episode steps and the
geometric offsets against their laws (randomised PIT, chi-square), the geometric offset's
distribution function ``P(K <= n) = 1 - gamma**n`` (``clip``; divided by ``1 - gamma**(T - t)``
when renormalised), random states uniform over the split's states, and that the goal draws of
consecutive heads on one row are independent (their PIT pairs uniform on the square).
"""

from __future__ import annotations

import numpy as np

from goalkit.audit.laws import geometric_law, uniform_law
from goalkit.audit.recipe_text import HEAD_SOURCE_CODES
from goalkit.audit.rowrules import reward_rules
from goalkit.audit.stattests import binom_check, count_bound_check, grid_chi2_check
from goalkit.logs.episodes import chunk_bounds

#: Salt of the heads' PIT jitter (apart from the main audit's, so its draws are unchanged).
HEAD_JITTER_SALT = 0x68656164
SOURCE_NAMES = {v: k for k, v in HEAD_SOURCE_CODES.items()}
CUR, FUT, GEO, RND, NEG, FIN, EPI, SUB = (HEAD_SOURCE_CODES[n] for n in (
    "current", "future", "geometric", "random", "negative", "final", "episode", "subgoal"))
FIELDS = ("source", "goal_episode", "goal_step", "steps_to_goal", "goal", "goal_distance", "reward", "reached",
          "terminal", "discount_weight", "return_to_goal", "bootstrap_mask")


def column(field: str, head: str) -> str:
    """The stored name of a head column, as docs/dataset.md states it."""
    return f"{field}@{head}"


class HeadAudit:
    """Accumulates the head rules and draws of an audit, block by block.

    Parameters
    ----------
    rc : AuditRecipe
    logs : object
        The audit's reopened logs (``source``, ``ids``, ``lengths``, ``goal_map``, ``goal_dtype``).
    draws : object
        The audit's law accumulator (``law(name, rows, mask)``); the heads' laws join its checks.
    seed : int
    masks : MaskAudit or None
    """

    def __init__(self, rc, logs, draws, seed: int, masks=None):
        self.rc, self.logs, self.draws, self.masks = rc, logs, draws, masks
        self.heads = rc.heads
        self.jitter = np.random.default_rng([int(seed), HEAD_JITTER_SALT])
        self.counts = {h.name: np.zeros(len(HEAD_SOURCE_CODES), np.int64) for h in self.heads}
        self.offsets = {h.name: [0, {}] for h in self.heads}
        # PIT pairs of consecutive heads (h, h + 1) on a 10 x 10 grid: their draws are independent
        self.grids = {(a.name, b.name): np.zeros((10, 10), np.int64) for a, b in zip(self.heads, self.heads[1:])}
        # phi of every state of the logs, episode by episode, read once (goals of any episode)
        lengths = logs.lengths
        self.starts = np.concatenate([[0], np.cumsum(lengths + 1)]).astype(np.int64)
        parts = []
        for a, b in chunk_bounds(lengths, 1 << 18):
            chunk = logs.source.read(a, b)
            parts.append(np.asarray(logs.goal_map(chunk, np.arange(chunk.observations.shape[0])))
                         .astype(logs.goal_dtype))
        self.phi = np.concatenate(parts) if parts else np.zeros((0, logs.goal_map.dim), logs.goal_dtype)

    def missing(self, group) -> list:
        """Head columns the set lacks."""
        need = [column(f, h.name) for h in self.heads for f in FIELDS]
        if self.masks is not None:
            need += [column("goal_mask", h.name) for h in self.heads]
        return [n for n in need if n not in group]

    def _state(self, episodes, steps):
        pos = np.searchsorted(self.logs.ids, episodes)
        return self.starts[np.minimum(pos, len(self.logs.ids) - 1)] + steps

    def block(self, group, a, b, keep, ep, t, T, members, violated, task_ids=None):
        """Check the head columns of rows ``a:b`` (``keep``: rows whose source episode is known)."""
        achieved = self.phi[self._state(ep, t + 1)]
        split_ids = members
        split_len = self.logs.length_of(split_ids)
        split_start = np.concatenate([[0], np.cumsum(split_len + 1)]).astype(np.int64)
        pits = []
        for head in self.heads:
            c = {f: group[column(f, head.name)][a:b][keep] for f in FIELDS}
            if self.masks is not None:
                c["goal_mask"] = group[column("goal_mask", head.name)][a:b][keep]
            pits.append(self._head(head, c, ep, t, T, achieved, split_ids, split_start, violated, task_ids))
        for (pair, grid), ua, ub in zip(self.grids.items(), pits, pits[1:]):
            both = np.isfinite(ua) & np.isfinite(ub)
            np.add.at(grid, (np.minimum((ua[both] * 10).astype(np.int64), 9),
                             np.minimum((ub[both] * 10).astype(np.int64), 9)), 1)

    def _head(self, head, c, ep, t, T, achieved, split_ids, split_start, violated, task_ids):
        n = head.name
        s = c["source"].astype(np.int64)
        ge, j, d = c["goal_episode"], c["goal_step"], c["steps_to_goal"]
        self.counts[n] += np.bincount(s, minlength=len(HEAD_SOURCE_CODES))[:len(HEAD_SOURCE_CODES)]
        own = ge == ep
        T_goal = self.logs.length_of(ge)
        in_split = np.isin(ge, split_ids)
        expect_d = np.where(own & (j >= t), j - t, -1)
        later = own & (j > t) & (j <= T)
        ok_by = {
            CUR: ("current: the goal is s_t", own & (j == t)),
            FUT: ("future: the goal is s_j of the own episode, t < j <= T", later),
            GEO: ("geometric: the goal is s_j of the own episode, t < j <= T", later),
            FIN: ("final: the goal is s_T", own & (j == T)),
            EPI: ("episode: the goal is s_j of the own episode, 0 <= j <= T", own & (j >= 0) & (j <= T)),
            SUB: (f"subgoal: the goal is s_min(t + {head.steps}, T)", own & (j == np.minimum(t + head.steps, T))),
            RND: ("random: the goal is a state of an episode of the same split",
                  in_split & (T_goal >= 0) & (j >= 0) & (j <= T_goal)),
        }
        valid = np.isin(s, list(head.shares))
        violated(f"head {n}: source", f"head {n}: source code not among the head's positive weights", ~valid)
        for code, (message, ok) in ok_by.items():
            bad = (s == code) & ~ok
            violated(f"head {n}: {SOURCE_NAMES[code]}", f"head {n}: {message}", bad)
            valid &= ~bad
        bad = valid & (d != expect_d)
        violated(f"head {n}: steps_to_goal", f"head {n}: steps_to_goal is not j - t for a state j >= t of the own "
                 "episode (else -1)", bad)
        idx = np.flatnonzero(valid)
        goal_ok = np.ones(len(s), bool)
        goal_ok[idx] = np.all(c["goal"][idx] == self.phi[self._state(ge[idx], j[idx])], axis=1)
        violated(f"head {n}: goal", f"head {n}: goal is not phi of state goal_step of goal_episode", ~goal_ok)
        for rule, message, mask in reward_rules(c, achieved, c["goal"], self.rc):
            violated(f"head {n}: {rule}", f"head {n}: {message}", mask)
        self._labels(head, c, violated)
        if self.masks is not None:
            tasks = np.full(len(s), -1, np.int64) if task_ids is None else task_ids
            for rule, message, mask in self.masks.rules(c["goal_mask"], np.ones(len(s), np.int64), tasks):
                violated(f"head {n}: {rule}", f"head {n}: {message}", mask)
        return self._laws(head, s, ge, j, t, T, valid, split_ids, split_start)

    @staticmethod
    def _labels(head, c, violated):
        d = c["steps_to_goal"].astype(np.int64)
        g = float(head.gamma)
        known = d >= 0
        weight = np.where(known, g ** np.where(known, d, 0).astype(np.float64), 0.0)
        ret = np.where(known, -(1.0 - weight) / (1.0 - g), -1.0 / (1.0 - g))   # sum of -g**k, k < d
        n = head.name
        violated(f"head {n}: discount_weight", f"head {n}: discount_weight is not gamma**steps_to_goal "
                 "(0 without a path)", ~(np.abs(c["discount_weight"].astype(np.float64) - weight) <= 4e-7))
        violated(f"head {n}: return_to_goal", f"head {n}: return_to_goal is not -(1 - gamma**d) / (1 - gamma)",
                 ~(np.abs(c["return_to_goal"].astype(np.float64) - ret) <= 4e-7 * np.maximum(1.0, np.abs(ret))))
        violated(f"head {n}: bootstrap_mask", f"head {n}: bootstrap_mask is not 1 - terminal",
                 c["bootstrap_mask"].astype(np.int64) != 1 - c["terminal"].astype(np.int64))

    def _laws(self, head, s, ge, j, t, T, valid, split_ids, split_start):
        v = self.jitter.random((len(s), 4))
        n = head.name
        pit = np.full(len(s), np.nan)   # each row's PIT under its source's law (NaN: a fixed source)
        past = "clip" if head.past_end == "clip" else "truncate"   # renormalised: the law given K <= T - t
        laws = ((FUT, "future step", lambda: uniform_law(j, t + 1, T, v[:, 0])),
                (EPI, "episode step", lambda: uniform_law(j, 0, T, v[:, 1])),
                (GEO, "geometric offset", lambda: geometric_law(j - t, T - t, head.gamma, past, v[:, 2])))
        for code, what, law in laws:
            if code in head.shares:
                rows, mask = law(), valid & (s == code)
                self.draws.law(f"head {n}: {what}", rows, mask)
                pit[mask] = rows.pit[mask]
        if RND in head.shares:
            rank = split_start[np.minimum(np.searchsorted(split_ids, ge), len(split_ids) - 1)] + j
            rows, mask = uniform_law(rank, 0, split_start[-1] - 1, v[:, 3]), valid & (s == RND)
            self.draws.law(f"head {n}: random state", rows, mask)
            pit[mask] = rows.pit[mask]
        if GEO in head.shares:   # P(K <= m) = 1 - gamma**m at m = floor((T - t) / 2), rows with T - t >= 2
            room = T - t
            rows = valid & (s == GEO) & (room >= 2)
            m = (room // 2).astype(np.float64)
            g = float(head.gamma)
            p = 1.0 - g ** m
            if past == "truncate":
                p = p / (1.0 - g ** room.astype(np.float64))
            acc = self.offsets[n]
            acc[0] += int(np.count_nonzero(rows & (j - t <= room // 2)))
            values, counts = np.unique(p[rows], return_counts=True)
            for value, count in zip(values.tolist(), counts.tolist()):
                acc[1][value] = acc[1].get(value, 0) + count
        return pit

    def checks(self) -> list:
        """Share of every source of every head (binomial) and the geometric offsets' distribution function."""
        out = []
        for head in self.heads:
            counts = self.counts[head.name]
            total = int(counts.sum())
            for code, p in head.shares.items():
                out.append(binom_check(f"head {head.name}: share of {SOURCE_NAMES[code]}", int(counts[code]), total,
                                       p, f"rows of head {head.name} drawing {SOURCE_NAMES[code]}"))
            hits, probs = self.offsets[head.name]
            if probs:
                out.append(count_bound_check(f"head {head.name}: geometric P(K <= (T - t) // 2)", hits,
                                             list(probs), list(probs.values()), "rows with K <= (T - t) // 2"))
        for (a, b), grid in self.grids.items():
            out.append(grid_chi2_check(f"heads {a} / {b}: independent draws", grid,
                                       f"PIT pairs of heads {a} and {b} on one row"))
        return [c for c in out if c is not None]
