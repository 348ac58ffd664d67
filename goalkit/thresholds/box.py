"""Per-dimension tolerance suggestions for the ``box`` distance.

The box rule calls a pair reached iff ``|achieved_d - goal_d| <= tol_d`` for every goal
dimension ``d`` (see :mod:`goalkit.reward`). Two suggestions from labelled pairs, both from
the per-dimension absolute differences ``|delta_d|`` of the pairs labelled reached:

``quantile``  ``tol_d`` = the ``q``-quantile of ``|delta_d|`` over reached pairs, each
              dimension on its own. Every single dimension then admits a fraction ``q`` of
              the reached pairs; the box as a whole admits at most that (about ``q**G`` for
              independent dimensions) -- the achieved recall is reported.
``recall``    the smallest box of a fixed shape that admits at least a fraction ``r`` of the
              reached pairs. The shape is the per-dimension ``q``-quantile above (``q``
              defaults to ``r``); the box ``s * shape`` admits a pair iff its scaled
              Chebyshev distance ``m = max_d |delta_d| / shape_d`` is ``<= s``, so the
              smallest such ``s`` is the ``ceil(r * P)``-th smallest ``m`` over the ``P``
              reached pairs (exact, no search).

A dimension where no reached pair differs (``shape_d = 0``) gets half the smallest non-zero
``|delta_d|`` among all labelled pairs (so it admits exactly the pairs with no difference
there), or 1.0 when no pair differs in it at all; both cases are listed in ``notes``.
Quantiles are numpy's ``"linear"`` definition (Hyndman and Fan, 1996, definition 7).
"""

from __future__ import annotations

from goalkit.errors import shown

import math
from dataclasses import dataclass

import numpy as np

from goalkit.errors import TuningError

#: Suggestion methods.
BOX_METHODS = ("quantile", "recall")


@dataclass(frozen=True)
class BoxSuggestion:
    """Suggested box tolerances and how they do on the labelled pairs.

    Attributes
    ----------
    tolerances : tuple of float
        One tolerance per goal dimension (the recipe's ``threshold`` list for ``box``).
    method : str
        One of :data:`BOX_METHODS`.
    quantile : float
        The per-dimension quantile used (the shape for ``recall``).
    recall_target : float or None
        The target of ``recall``.
    recall : float
        Fraction of reached pairs inside the box.
    false_accept : float
        Fraction of not-reached pairs inside the box (NaN when there are none).
    precision : float
        Reached pairs among the pairs inside the box (NaN when the box admits none).
    notes : tuple of str
        Dimensions whose tolerance came from a fallback.
    """

    tolerances: tuple[float, ...]
    method: str
    quantile: float
    recall_target: float | None
    recall: float
    false_accept: float
    precision: float
    notes: tuple[str, ...] = ()

    def as_dict(self) -> dict:
        """JSON-able form."""
        out = {k: getattr(self, k) for k in self.__dataclass_fields__}
        out["tolerances"] = list(self.tolerances)
        out["notes"] = list(self.notes)
        return out


def _deltas(achieved, goal, labels):
    a = np.asarray(achieved, dtype=np.float64)
    g = np.asarray(goal, dtype=np.float64)
    y = np.asarray(labels).astype(bool)
    if a.ndim != 2 or a.shape != g.shape or y.shape != (a.shape[0],):
        raise TuningError(f"expected achieved and goal of one shape (M, G) and labels (M,), got "
                          f"{a.shape}, {g.shape}, {y.shape}")
    if not y.any():
        raise TuningError("box tolerances need at least one pair labelled reached (1)")
    return np.abs(a - g), y


def _inside(delta, tol):
    return np.all(delta <= tol[None, :], axis=1)


def _shape(delta, y, q):
    shape = np.quantile(delta[y], q, axis=0, method="linear")
    notes = []
    for dim in np.flatnonzero(shape <= 0).tolist():  # loop over goal dimensions
        nz = delta[:, dim][delta[:, dim] > 0]
        if nz.size:
            shape[dim] = nz.min() / 2.0
            notes.append(f"dimension {dim}: no reached pair differs; tolerance = half the "
                         f"smallest non-zero difference")
        else:
            shape[dim] = 1.0
            notes.append(f"dimension {dim}: no pair differs at all; tolerance 1.0 is arbitrary")
    return shape, tuple(notes)


def suggest_box(achieved, goal, labels, *, method: str = "quantile", quantile: float | None = None,
                recall: float = 0.95) -> BoxSuggestion:
    """Suggest per-dimension box tolerances from labelled pairs.

    Parameters
    ----------
    achieved, goal : array_like, shape (M, G)
        Reached goal ``phi(s_{t+1})`` and goal of each labelled pair.
    labels : array_like of {0, 1}, shape (M,)
        1 where the pair counts as reached.
    method : {"quantile", "recall"}
        See the module docstring.
    quantile : float, optional
        Per-dimension quantile in (0, 1]; defaults to 0.95 for ``quantile`` and to ``recall``
        for ``recall``.
    recall : float
        Recall target of ``recall``, in (0, 1].

    Returns
    -------
    BoxSuggestion

    Examples
    --------
    >>> a = np.array([[0.1, 0.0], [0.0, 0.2], [0.05, 0.1], [1.0, 1.0]])
    >>> s = suggest_box(a, np.zeros_like(a), [1, 1, 1, 0], method="recall", recall=1.0, quantile=1.0)
    >>> s.tolerances, s.recall, s.false_accept
    ((0.1, 0.2), 1.0, 0.0)
    """
    if method not in BOX_METHODS:
        raise TuningError(f"unknown box method {method!r}; valid: {', '.join(BOX_METHODS)}", key="method")
    if not (0.0 < recall <= 1.0):
        raise TuningError(f"expected a recall target in (0, 1], got {shown(recall)}", key="recall")
    q = (0.95 if method == "quantile" else recall) if quantile is None else float(quantile)
    if not (0.0 < q <= 1.0):
        raise TuningError(f"expected a quantile in (0, 1], got {shown(quantile)}", key="quantile")
    delta, y = _deltas(achieved, goal, labels)
    shape, notes = _shape(delta, y, q)
    if method == "quantile":
        tol = shape
    else:
        m = np.max(delta[y] / shape[None, :], axis=1, initial=0.0)
        need = max(1, math.ceil(recall * m.size - 1e-9))
        s = np.partition(m, need - 1)[need - 1]
        tol = shape * s if s > 0 else shape
    inside = _inside(delta, tol)
    n_neg = int((~y).sum())
    n_in = int(inside.sum())
    return BoxSuggestion(
        tolerances=tuple(float(t) for t in tol), method=method, quantile=q,
        recall_target=float(recall) if method == "recall" else None,
        recall=float(inside[y].mean()),
        false_accept=float(inside[~y].mean()) if n_neg else float("nan"),
        precision=float(inside[y].sum() / n_in) if n_in else float("nan"),
        notes=notes)
