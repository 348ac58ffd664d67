"""Reward rules: a distance in goal space, a threshold and a reward form.

A :class:`RewardRule` scores pairs ``(achieved, goal)`` where ``achieved = phi(s_{t+1})``
is the goal reached by transition ``t``. Everything is vectorised over (M, G) arrays.

Distances (``w_d`` are the optional per-dimension weights, all 1 when omitted;
``delta_d = achieved_d - goal_d``)::

    euclidean   sqrt(sum_d w_d * delta_d**2)
    l1          sum_d w_d * |delta_d|
    chebyshev   max_d w_d * |delta_d|
    cosine      1 - sum_d w_d a_d g_d / sqrt(sum_d w_d a_d**2 * sum_d w_d g_d**2)
                (0 when both vectors are zero, 1 when exactly one is; clipped to [0, 2])
    box         max_d |delta_d| / tol_d   (the threshold is the tolerance vector tol;
                reached iff |delta_d| <= tol_d for every d, i.e. distance <= 1; no weights)
    region      max_d max(lower_d - delta_d, delta_d - upper_d)   (signed: negative inside;
                one-sided bounds use -inf / inf; reached iff distance <= threshold, 0 by
                default, so reached iff lower_d <= delta_d <= upper_d for every d; no weights;
                sparse forms only)

Goal masks: every distance can be given a per-row mask (M, G) of the goal dimensions that
count. A dimension outside the mask contributes nothing: its term is left out of the sum
(euclidean, l1), of the maximum (chebyshev, box, region) and of the three sums of cosine.
A full mask gives the unmasked distance bit for bit. A row's mask must keep at least one
dimension (a row with none has distance 0, or -inf for region).

Reached: ``distance <= threshold`` when ``inclusive`` (the default), ``distance < threshold``
otherwise; for ``box`` the comparison is with 1.

Reward forms::

    sparse                       1 if reached else 0
    sparse-negative              0 if reached else -1
    negative-distance            -distance
    clipped-negative-distance    -min(distance, clip)
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from goalkit.config import check_keys, closest
from goalkit.errors import ParameterError, shown

#: Distance names accepted in ``[reward] distance``.
DISTANCES = ("euclidean", "l1", "chebyshev", "cosine", "box", "region")
#: Reward form names accepted in ``[reward] form``.
FORMS = ("sparse", "sparse-negative", "negative-distance", "clipped-negative-distance")
#: Keys of the recipe's ``[reward]`` table.
TABLE_KEYS = ("distance", "threshold", "inclusive", "form", "weights", "clip", "end_on_reach", "lower",
              "upper")


def within(d, threshold, inclusive: bool) -> np.ndarray:
    """The reach comparison: ``d <= threshold`` when ``inclusive``, ``d < threshold`` otherwise.

    ``d`` and ``threshold`` broadcast (tuning compares one distance with many thresholds).
    Distances are compared in float64.
    """
    d = np.asarray(d, dtype=np.float64)
    return d <= threshold if inclusive else d < threshold


def _bad(message: str, parameter: str | None = None) -> ParameterError:
    """A :class:`ParameterError` of :class:`RewardRule`'s ``parameter``."""
    return ParameterError(message, owner="RewardRule", parameter=parameter)


def _choice_error(what: str, value, valid, *, parameter) -> ParameterError:
    hint = closest(str(value), valid)
    tip = f"; did you mean '{hint}'?" if hint else ""
    return _bad(f"unknown {what} {value!r}{tip} valid: {', '.join(valid)}", parameter)


def _is_number(x) -> bool:
    return isinstance(x, (int, float, np.integer, np.floating)) and not isinstance(x, (bool, np.bool_))


@dataclass(frozen=True, init=False)
class RewardRule:
    """How a transition's reached goal is scored against a goal.

    Parameters
    ----------
    distance : str
        One of :data:`DISTANCES`.
    threshold : float or tuple of float
        Reach threshold (>= 0). For ``distance="box"``: one tolerance (> 0) per goal
        dimension, and the normalised distance is compared with 1.
    inclusive : bool, default True
        Reached iff ``d <= threshold`` (True) or ``d < threshold`` (False).
    form : str, default "sparse"
        One of :data:`FORMS`.
    weights : tuple of float, optional
        Per-dimension weights (>= 0, not all zero), entering as in the module docstring.
        Not allowed with ``box`` (scale the tolerances instead).
    clip : float, optional
        Cap of the distance for ``clipped-negative-distance`` (required there, > 0); not
        allowed with other forms.
    end_on_reach : bool, default False
        Whether reaching the goal ends the episode (see :meth:`terminal`).
    lower, upper : tuple of float, optional
        For ``distance="region"`` only (and required there): per goal dimension, the bounds
        of ``achieved - goal`` (``-inf`` / ``inf`` for a one-sided or free dimension;
        ``lower_d <= upper_d``). ``threshold`` then moves every bound outwards by that
        amount (0 when omitted; negative shrinks the region).

    Attributes
    ----------
    distance_name : str
        The distance's name (the constructor's ``distance``; ``distance`` itself is the
        scoring method).

    Raises
    ------
    ParameterError
        If a value is impossible (see :meth:`from_table` for the list), naming the parameter.

    Examples
    --------
    >>> import numpy as np
    >>> rule = RewardRule("euclidean", 0.05, form="sparse-negative")
    >>> a, g = np.array([[0.0, 0.03], [0.0, 0.2]]), np.zeros((2, 2))
    >>> rule.reward(a, g)
    array([ 0., -1.], dtype=float32)
    >>> RewardRule("box", (0.1, 0.5)).distance(np.array([[0.05, 0.5]]), np.zeros((1, 2)))
    array([1.])
    """

    distance_name: str
    threshold: float | tuple[float, ...]
    inclusive: bool = True
    form: str = "sparse"
    weights: tuple[float, ...] | None = None
    clip: float | None = None
    end_on_reach: bool = False
    lower: tuple[float, ...] | None = None
    upper: tuple[float, ...] | None = None

    def __init__(self, distance: str, threshold=None, inclusive: bool = True, form: str = "sparse",
                 weights=None, clip=None, end_on_reach: bool = False, lower=None, upper=None):
        # The distance's *name* is stored as ``distance_name`` so that ``distance(...)`` can be
        # the scoring method of the contract; the constructor still takes ``distance=``.
        if isinstance(threshold, (list, tuple, np.ndarray)):
            threshold = tuple(float(x) if _is_number(x) else x for x in threshold)
        elif _is_number(threshold):
            threshold = float(threshold)
        if isinstance(weights, (list, tuple, np.ndarray)):
            weights = tuple(float(x) if _is_number(x) else x for x in weights)
        if clip is not None and _is_number(clip):
            clip = float(clip)
        if threshold is None and distance == "region":
            threshold = 0.0
        bounds = [tuple(float(x) if _is_number(x) else x for x in b)
                  if isinstance(b, (list, tuple, np.ndarray)) else b for b in (lower, upper)]
        for name, value in (("distance_name", distance), ("threshold", threshold),
                            ("inclusive", inclusive), ("form", form), ("weights", weights),
                            ("clip", clip), ("end_on_reach", end_on_reach), ("lower", bounds[0]),
                            ("upper", bounds[1])):
            object.__setattr__(self, name, value)
        self._validate()

    def replace(self, **changes) -> "RewardRule":
        """Return a copy with some constructor arguments changed (e.g. ``threshold=0.1``)."""
        return RewardRule(**{**self.describe(), **changes})

    # ---- checking ----------------------------------------------------------------------
    def _validate(self) -> None:
        if self.distance_name not in DISTANCES:
            raise _choice_error("distance", self.distance_name, DISTANCES, parameter="distance")
        if self.form not in FORMS:
            raise _choice_error("reward form", self.form, FORMS, parameter="form")
        if not isinstance(self.inclusive, (bool, np.bool_)):
            raise _bad(f"expected true or false, got {shown(self.inclusive)}", "inclusive")
        if not isinstance(self.end_on_reach, (bool, np.bool_)):
            raise _bad(f"expected true or false, got {shown(self.end_on_reach)}", "end_on_reach")
        thr = self.threshold
        if self.distance_name != "region" and (self.lower is not None or self.upper is not None):
            key = "lower" if self.lower is not None else "upper"
            raise _bad(f"lower and upper bounds need distance = 'region', not "
                              f"'{self.distance_name}'", key)
        if self.distance_name == "region":
            self._validate_region()
        elif self.distance_name == "box":
            if not isinstance(thr, tuple):
                raise _bad(f"distance 'box' expects a list of tolerances, one per goal dimension, got "
                           f"{shown(thr)} (a single tolerance for every dimension is distance = 'chebyshev')",
                           "threshold")
            if len(thr) == 0 or not all(_is_number(x) and math.isfinite(x) and x > 0 for x in thr):
                raise _bad(f"expected finite tolerances > 0, one per goal dimension, got "
                           f"{shown(list(thr))}", "threshold")
            if self.weights is not None:
                raise _bad("distance 'box' takes no weights (scale the tolerances in "
                           "threshold instead)", "weights")
        else:
            if isinstance(thr, tuple):
                raise _bad(f"a list of tolerances needs distance = 'box'; distance "
                           f"'{self.distance_name}' expects one number, got {shown(list(thr))}", "threshold")
            if not _is_number(thr) or not math.isfinite(thr) or thr < 0:
                raise _bad(f"expected a finite number >= 0, got {shown(thr)}", "threshold")
        if self.weights is not None:
            w = self.weights
            if not isinstance(w, tuple) or len(w) == 0:
                raise _bad(f"expected a non-empty list of weights, got {shown(w)}", "weights")
            if not all(_is_number(x) and math.isfinite(x) and x >= 0 for x in w):
                raise _bad(f"expected finite weights >= 0, got {shown(list(w))}", "weights")
            if not any(x > 0 for x in w):
                raise _bad("expected at least one weight > 0, got all zero", "weights")
        if self.form == "clipped-negative-distance":
            c = self.clip
            if c is None:
                raise _bad("form 'clipped-negative-distance' needs clip (a number > 0)", "clip")
            if not _is_number(c) or not math.isfinite(c) or c <= 0:
                raise _bad(f"expected a finite number > 0, got {shown(c)}", "clip")
        elif self.clip is not None:
            raise _bad(f"clip is used only with form 'clipped-negative-distance', "
                       f"not '{self.form}'", "clip")

    def _validate_region(self) -> None:
        """Check the bounds, threshold, weights and form of a region rule."""
        for name in ("lower", "upper"):
            b = getattr(self, name)
            if b is None:
                raise _bad(f"distance 'region' needs {name} (a list of bounds, one per goal "
                                  f"dimension; -inf or inf where a side is free)", name)
            if not isinstance(b, tuple) or len(b) == 0 or not all(_is_number(x) and not math.isnan(x)
                                                                    for x in b):
                raise _bad(f"expected a non-empty list of numbers (inf allowed), got {shown(b)}", name)
        if len(self.lower) != len(self.upper):
            raise _bad(f"expected as many upper bounds as lower bounds ({len(self.lower)}), "
                              f"got {len(self.upper)}", "upper")
        for d, (lo, hi) in enumerate(zip(self.lower, self.upper)):
            if lo > hi:
                raise _bad(f"expected lower <= upper in every dimension, got lower {lo} above "
                                  f"upper {hi} in dimension {d}", "lower")
            if lo == math.inf or hi == -math.inf:
                raise _bad(f"expected a region that is not empty, got [{lo}, {hi}] in "
                                  f"dimension {d}", "lower")
        if not _is_number(self.threshold) or not math.isfinite(self.threshold):
            raise _bad(f"expected a finite number (the margin added to every bound), got "
                              f"{self.threshold!r}", "threshold")
        if self.weights is not None:
            raise _bad("distance 'region' takes no weights", "weights")
        if not self.form.startswith("sparse"):
            raise _bad(f"distance 'region' is signed and takes the sparse forms only, not "
                              f"'{self.form}'", "form")

    def check_dim(self, goal_dim: int) -> None:
        """Check the rule against the goal dimension ``goal_dim``.

        Raises
        ------
        ParameterError
            If the box tolerances or the weights do not have one entry per goal dimension.
        """
        if self.distance_name == "box" and len(self.threshold) != goal_dim:
            raise _bad(f"expected {goal_dim} tolerances (one per goal dimension), got "
                       f"{len(self.threshold)}", "threshold")
        if self.weights is not None and len(self.weights) != goal_dim:
            raise _bad(f"expected {goal_dim} weights (one per goal dimension), got "
                       f"{len(self.weights)}", "weights")
        if self.distance_name == "region" and len(self.lower) != goal_dim:
            raise _bad(f"expected {goal_dim} bounds (one per goal dimension), got "
                              f"{len(self.lower)}", "lower")

    # ---- scoring -----------------------------------------------------------------------
    def _pair(self, achieved, goal) -> tuple[np.ndarray, np.ndarray]:
        """The two (M, G) inputs as arrays (dtype kept), checked against the rule's dimension."""
        a, g = np.asarray(achieved), np.asarray(goal)
        if a.ndim != 2 or a.shape != g.shape:
            raise ValueError(f"expected achieved and goal of one shape (M, G), got {a.shape} and {g.shape}")
        dim = len(self.threshold) if self.distance_name == "box" else (
            len(self.lower) if self.distance_name == "region" else
            len(self.weights) if self.weights is not None else a.shape[1])
        if a.shape[1] != dim:
            raise ValueError(f"the rule is for goals of dimension {dim}, got {a.shape[1]}")
        return a, g

    def distance(self, achieved, goal, mask=None) -> np.ndarray:
        """Return the distances, float64 of shape (M,), of (M, G) arrays ``achieved``, ``goal``.

        Computed in float64 whatever the input dtype. Each row's value depends only on that
        row (per-dimension terms are accumulated in dimension order), so the bits do not
        depend on how rows are batched.

        Parameters
        ----------
        achieved, goal : array_like (M, G)
        mask : array_like of bool or uint8 (M, G), optional
            The goal dimensions each row constrains (nonzero: counted). None: every dimension;
            a full mask gives the same bits as None.
        """
        a, g = self._pair(achieved, goal)
        if mask is not None:
            mask = np.asarray(mask)
            if mask.shape != a.shape:
                raise ValueError(f"expected a mask of shape {a.shape}, got {mask.shape}")
            mask = mask.astype(bool, copy=False)
        if self.distance_name != "cosine":
            return self._distance_by_dimension(a, g, mask)
        a, g = a.astype(np.float64, copy=False), g.astype(np.float64, copy=False)
        ww = np.ones(a.shape[1]) if self.weights is None else np.asarray(self.weights, dtype=np.float64)
        if mask is not None:  # w_d * 1 == w_d exactly: a full mask changes no bit
            ww = ww * mask
        dot = np.sum(ww * a * g, axis=1)
        na = np.sum(ww * a * a, axis=1)
        ng = np.sum(ww * g * g, axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            sim = dot / np.sqrt(na * ng)
        out = 1.0 - sim
        za, zg = na == 0, ng == 0
        out = np.where(za & zg, 0.0, np.where(za | zg, 1.0, out))
        return np.clip(out, 0.0, 2.0)

    def _distance_by_dimension(self, a: np.ndarray, g: np.ndarray, mask=None) -> np.ndarray:
        """Euclidean, L1, Chebyshev, box and region distances of checked inputs, one goal
        dimension at a time; dimensions outside ``mask`` (bool (M, G) or None) are left out.

        Works on columns of the (M, G) inputs, so there is no (M, G) float64 temporary and no
        short-axis reduction (both dominate the cost for the small G of goal spaces).
        """
        kind = self.distance_name
        if kind == "region":
            return self._region_distance(a, g, mask)
        weights = [float(x) for x in self.weights] if self.weights is not None else None
        out = np.zeros(a.shape[0], dtype=np.float64)
        col = np.empty(a.shape[0], dtype=np.float64)
        for k in range(a.shape[1]):
            np.subtract(a[:, k], g[:, k], out=col, dtype=np.float64)
            if mask is not None:  # a left-out dimension adds 0 to the sum and to the maximum
                np.copyto(col, 0.0, where=~mask[:, k])
            np.abs(col, out=col)
            if kind == "euclidean":
                np.multiply(col, col, out=col)
            if kind == "box":
                np.divide(col, float(self.threshold[k]), out=col)
            elif weights is not None:
                np.multiply(col, weights[k], out=col)
            if kind in ("euclidean", "l1"):
                np.add(out, col, out=out)
            else:  # chebyshev, box: the largest per-dimension term (0 when G = 0)
                np.maximum(out, col, out=out)
        if kind == "euclidean":
            np.sqrt(out, out=out)
        return out

    def _region_distance(self, a: np.ndarray, g: np.ndarray, mask) -> np.ndarray:
        """The signed region distance ``max_d max(lower_d - delta_d, delta_d - upper_d)``."""
        out = np.full(a.shape[0], -np.inf, dtype=np.float64)
        col = np.empty(a.shape[0], dtype=np.float64)
        term = np.empty(a.shape[0], dtype=np.float64)
        for k in range(a.shape[1]):
            np.subtract(a[:, k], g[:, k], out=col, dtype=np.float64)
            np.subtract(self.lower[k], col, out=term)
            np.subtract(col, self.upper[k], out=col)
            np.maximum(term, col, out=col)
            if mask is not None:
                np.copyto(col, -np.inf, where=~mask[:, k])
            np.maximum(out, col, out=out)
        return out

    def reached(self, achieved, goal, mask=None) -> np.ndarray:
        """Return the reached flags, bool of shape (M,) (``mask`` as in :meth:`distance`)."""
        return self.reached_from(self.distance(achieved, goal, mask))

    def reached_from(self, d) -> np.ndarray:
        """Return the reached flags, bool (M,), for precomputed distances ``d`` (M,).

        ``d <= threshold`` when inclusive, ``d < threshold`` otherwise; for ``box`` the
        (normalised) distance is compared with 1.
        """
        return within(d, self.reach_threshold, self.inclusive)

    _reached_from = reached_from  # kept: callers written against the first version use it

    @property
    def reach_threshold(self) -> float:
        """The number distances are compared with: ``threshold``, or 1 for ``box``."""
        return 1.0 if self.distance_name == "box" else float(self.threshold)

    def reward(self, achieved, goal, mask=None) -> np.ndarray:
        """Return the rewards, float32 of shape (M,), in the rule's form (``mask``: :meth:`distance`)."""
        d = self.distance(achieved, goal, mask)
        return self.reward_from(d)

    def reward_from(self, d: np.ndarray) -> np.ndarray:
        """Return the rewards, float32 (M,), for precomputed distances ``d`` (M,)."""
        d = np.asarray(d, dtype=np.float64)
        return self._reward(d, self.reached_from(d) if self.form.startswith("sparse") else None)

    def _reward(self, d: np.ndarray, reached) -> np.ndarray:
        """Rewards for float64 distances ``d`` and their reached flags (used by the sparse forms)."""
        if self.form == "sparse":
            return reached.astype(np.float32)
        if self.form == "sparse-negative":
            return reached.astype(np.float32) - np.float32(1.0)
        if self.form == "negative-distance":
            return (-d).astype(np.float32)
        return (-np.minimum(d, self.clip)).astype(np.float32)

    def terminal(self, achieved, goal, mask=None) -> np.ndarray:
        """Return the episode-end flags, bool (M,): ``reached`` if ``end_on_reach``, else all False."""
        return score(self, achieved, goal, mask).terminal

    def describe(self) -> dict:
        """Return a JSON-able description (the ``[reward]`` table that rebuilds this rule)."""
        out: dict[str, Any] = {
            "distance": self.distance_name,
            "threshold": list(self.threshold) if isinstance(self.threshold, tuple) else self.threshold,
            "inclusive": bool(self.inclusive),
            "form": self.form,
            "end_on_reach": bool(self.end_on_reach),
        }
        if self.weights is not None:
            out["weights"] = list(self.weights)
        if self.clip is not None:
            out["clip"] = self.clip
        if self.lower is not None:
            out["lower"] = list(self.lower)
        if self.upper is not None:
            out["upper"] = list(self.upper)
        return out

    # ---- the recipe table --------------------------------------------------------------
    @classmethod
    def from_table(cls, table: Mapping[str, Any]) -> "RewardRule":
        """Build a rule from a mapping of its parameters, as in the recipe's ``[reward]`` table.

        Parameters
        ----------
        table : mapping
            Parameter name -> value, with TOML's types (lists, not tuples). ``threshold`` is
            required; ``distance`` defaults to ``"euclidean"``, ``form`` to ``"sparse"``,
            ``inclusive`` to true, ``end_on_reach`` to false.

        Raises
        ------
        ParameterError
            On an unknown parameter (lists the valid ones and the closest), an unknown distance
            or form (lists the valid ones), a negative or non-numeric threshold, box tolerances
            that are not a list of positive numbers, negative or all-zero weights, a clip
            <= 0 or missing for ``clipped-negative-distance``, or a clip given for another form.
            The goal dimension is checked separately by :meth:`check_dim`. The recipe loader
            re-raises it naming the recipe file and key.
        """
        if not isinstance(table, Mapping):
            raise _bad(f"expected a table of parameter -> value, got {table!r}")
        check_keys(table, TABLE_KEYS, file=None, section="[reward]",
                   error=lambda message, file=None, key=None: _bad(message, key))
        if "threshold" not in table and table.get("distance") != "region":
            raise _bad("missing threshold (a number >= 0, or for distance 'box' a list of tolerances)",
                       "threshold")
        distance = table.get("distance", "euclidean")
        form = table.get("form", "sparse")
        for key, value in (("distance", distance), ("form", form)):
            if not isinstance(value, str):
                raise _bad(f"expected a string, got {value!r}", key)
        thr = table.get("threshold")
        if thr is None:
            pass
        elif isinstance(thr, list):
            if not all(_is_number(x) for x in thr):
                raise _bad(f"expected a list of numbers, got {shown(thr)}", "threshold")
            thr = tuple(float(x) for x in thr)
        elif not _is_number(thr):
            raise _bad(f"expected a number, got {shown(thr)}", "threshold")
        weights = table.get("weights")
        if weights is not None:
            if not isinstance(weights, list) or not all(_is_number(x) for x in weights):
                raise _bad(f"expected a list of numbers, got {shown(weights)}", "weights")
            weights = tuple(float(x) for x in weights)
        clip = table.get("clip")
        if clip is not None and not _is_number(clip):
            raise _bad(f"expected a number, got {shown(clip)}", "clip")
        bounds = {}
        for name in ("lower", "upper"):
            b = table.get(name)
            if b is not None and (not isinstance(b, list) or not all(_is_number(x) for x in b)):
                raise _bad(f"expected a list of numbers (inf and -inf allowed), got {shown(b)}", name)
            bounds[name] = None if b is None else tuple(float(x) for x in b)
        return cls(distance=distance, threshold=thr, inclusive=table.get("inclusive", True),
                   form=form, weights=weights, clip=clip, end_on_reach=table.get("end_on_reach", False), **bounds)


@dataclass(frozen=True, eq=False)
class Scores:
    """What a reward rule gives a batch of goal rows (see :func:`score`).

    Attributes
    ----------
    distance : ndarray of float64 (M,)
    reached : ndarray of bool (M,)
    reward : ndarray of float32 (M,)
    terminal : ndarray of bool (M,)
        ``reached`` when the rule ends episodes on reaching (``end_on_reach``), else all False.
    """

    distance: np.ndarray
    reached: np.ndarray
    reward: np.ndarray
    terminal: np.ndarray

    def columns(self) -> dict:
        """The stored columns (:data:`goalkit.rows.SCORE_COLUMNS`) in their stored dtypes."""
        return {"goal_distance": self.distance.astype(np.float32), "reward": self.reward,
                "reached": self.reached.astype(np.uint8), "terminal": self.terminal.astype(np.uint8)}


def score(rule: RewardRule, reached_goal, goal, mask=None) -> Scores:
    """Score goal rows: distance -> reached -> reward -> terminal, the one place this is done.

    The builder, verify, the sampler and tuning all score rows here, so a stored row, a
    re-derived row and a sampled row agree bit for bit.

    Parameters
    ----------
    rule : RewardRule
    reached_goal : array_like (M, G)
        ``phi(s_{t+1})`` of each row's transition (any float dtype; the distance is float64).
    goal : array_like (M, G)
        The goal of each row.
    mask : array_like of bool or uint8 (M, G), optional
        The goal dimensions each row constrains (the ``goal_mask`` column); None or a full
        mask: every dimension, with the same bits.

    Returns
    -------
    Scores

    Examples
    --------
    >>> rule = RewardRule("l1", 1.0, form="sparse-negative", end_on_reach=True)
    >>> s = score(rule, np.array([[0.5], [2.0]]), np.zeros((2, 1)))
    >>> s.distance.tolist(), s.reached.tolist(), s.reward.tolist(), s.terminal.tolist()
    ([0.5, 2.0], [True, False], [0.0, -1.0], [True, False])
    """
    return score_distances(rule, rule.distance(reached_goal, goal, mask))


def score_distances(rule: RewardRule, d) -> Scores:
    """:func:`score` for precomputed distances ``d`` (M,) of ``rule``."""
    d = np.asarray(d, dtype=np.float64)
    reached = rule.reached_from(d)
    terminal = reached if rule.end_on_reach else np.zeros_like(reached)
    return Scores(d, reached, rule._reward(d, reached), terminal)
