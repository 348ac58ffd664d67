"""The parts of a stored recipe the audit needs, parsed from its TOML text with tomllib.

Defaults are the documented ones (docs/relabel.md, docs/reward.md, docs/recipe.md), written
here a second time rather than taken from the builder's classes.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass

#: Strategy codes as documented in docs/dataset.md (never renumbered).
CODE_NAMES = {0: "original", 1: "final", 2: "future", 3: "episode", 4: "geometric",
              5: "other_episode", 6: "neighbour", 7: "library", 8: "near_miss"}
NAME_CODES = {v: k for k, v in CODE_NAMES.items()}
#: Goal-source codes of goal heads as documented in docs/dataset.md (never renumbered).
HEAD_SOURCE_CODES = {"current": 0, "future": 1, "geometric": 2, "random": 3, "negative": 4, "final": 5,
                     "episode": 6, "subgoal": 7}


@dataclass(frozen=True)
class AuditHead:
    """One ``[heads.NAME]`` table as the audit reads it (defaults of docs/recipe.md).

    Attributes
    ----------
    name : str
    shares : dict of int to float
        Source code -> probability (positive weights only, normalised).
    gamma : float
    past_end : str
        ``clip`` or ``renormalise``.
    steps : int
        ``k`` of the subgoal source.
    """

    name: str
    shares: dict
    gamma: float = 0.99
    past_end: str = "clip"
    steps: int = 25


def _heads(doc) -> tuple:
    out = []
    for name, table in dict(doc.get("heads", {})).items():
        raw = dict(table.get("weights", {"geometric": 1}))
        unknown = [n for n in raw if n not in HEAD_SOURCE_CODES]
        if unknown:
            raise ValueError(f"unknown goal source {unknown[0]!r} in the stored recipe")
        positive = {HEAD_SOURCE_CODES[n]: float(w) for n, w in raw.items() if float(w) > 0}
        total = sum(positive.values())
        if total <= 0:
            raise ValueError(f"head {name!r} of the stored recipe has no positive weight")
        out.append(AuditHead(str(name), {c: positive[c] / total for c in sorted(positive)},
                             float(table.get("gamma", 0.99)), str(table.get("past_end", "clip")),
                             int(table.get("steps", 25))))
    return tuple(out)


@dataclass(frozen=True)
class AuditRecipe:
    """What the audit reads from the recipe text.

    Attributes
    ----------
    weights : dict of int to float
        Strategy code -> probability (normalised, positive weights only).
    goals_per_transition : int
    gamma : float
    past_end : str
    distance : str
    threshold : float or tuple of float
    inclusive, end_on_reach : bool
    form : str
    weights_dim : tuple of float or None
        The reward rule's per-dimension weights.
    clip : float or None
    lower, upper : tuple of float or None
        The bounds of a ``region`` rule.
    mask : dict or None
        The ``[mask]`` table as written (None: the set has no goal masks).
    validation : float
        Fraction of episodes in the validation split.
    goal : dict
        The ``[goal]`` table.
    skip_bad_episodes : bool
    named_sources : bool
        The recipe names its sources (``[[sources]]``): rows carry a ``source`` column.
    guard_neighbours : bool
        ``[graph] guard_neighbours`` (dropped neighbour goals fall back to their join state).
    graph : dict or None
        The ``[graph]`` table (graph distances), None without one.
    observation_dtype, action_dtype : str or None
        ``[output] observation_dtype`` / ``action_dtype``: the stored dtypes the recipe asks for
        (None: the logs' dtype).
    source_goals : dict
        Source name -> ``goals_per_transition`` of the ``[[sources]]`` that give their own.
    goal_layout : str
        ``[output] goals``: ``slots`` or ``heads`` (one row per transition, head columns).
    heads : tuple of AuditHead
        The ``[heads.NAME]`` tables, in the recipe's order (a head's position is its slot).
    """

    weights: dict
    goals_per_transition: int
    gamma: float
    past_end: str
    distance: str
    threshold: object
    inclusive: bool
    form: str
    weights_dim: tuple | None
    clip: float | None
    end_on_reach: bool
    validation: float
    goal: dict
    skip_bad_episodes: bool
    named_sources: bool = False
    lower: tuple | None = None
    upper: tuple | None = None
    mask: dict | None = None
    guard_neighbours: bool = False
    graph: dict | None = None
    observation_dtype: str | None = None
    action_dtype: str | None = None
    source_goals: dict = None
    goal_layout: str = "slots"
    heads: tuple = ()


def parse_audit_recipe(text: str) -> AuditRecipe:
    """Parse the stored recipe ``text``; raises ``ValueError`` on what the audit cannot use."""
    doc = tomllib.loads(text)
    relabel = doc.get("relabel", {})
    raw = relabel.get("weights", {"future": 1})
    unknown = [n for n in raw if n not in NAME_CODES]
    if unknown:
        raise ValueError(f"unknown strategy {unknown[0]!r} in the stored recipe")
    positive = {NAME_CODES[n]: float(w) for n, w in raw.items() if float(w) > 0}
    total = sum(positive.values())
    if not positive or total <= 0:
        raise ValueError("the stored recipe has no positive strategy weight")
    reward = doc.get("reward", {})
    # a region rule's threshold (its margin) is 0 when omitted (docs/reward.md)
    thr = reward["threshold"] if "threshold" in reward or reward.get("distance") != "region" else 0.0
    thr = tuple(float(x) for x in thr) if isinstance(thr, list) else float(thr)
    w = reward.get("weights")
    layout = str(doc.get("output", {}).get("goals", "slots"))
    return AuditRecipe(
        weights={c: positive[c] / total for c in sorted(positive)},
        goals_per_transition=int(relabel.get("goals_per_transition", 1 if layout == "heads" else 4)),
        gamma=float(relabel.get("gamma", 0.9)),
        past_end=str(relabel.get("past_end", "clip")),
        distance=str(reward.get("distance", "euclidean")),
        threshold=thr,
        inclusive=bool(reward.get("inclusive", True)),
        form=str(reward.get("form", "sparse")),
        weights_dim=tuple(float(x) for x in w) if w is not None else None,
        clip=float(reward["clip"]) if "clip" in reward else None,
        end_on_reach=bool(reward.get("end_on_reach", False)),
        validation=float(doc.get("split", {}).get("validation", 0.1)),
        goal=dict(doc.get("goal", {})),
        skip_bad_episodes=bool(doc.get("logs", {}).get("skip_bad_episodes", False)),
        named_sources=isinstance(doc.get("sources"), list),
        lower=tuple(float(x) for x in reward["lower"]) if "lower" in reward else None,
        upper=tuple(float(x) for x in reward["upper"]) if "upper" in reward else None,
        mask=dict(doc["mask"]) if "mask" in doc else None,
        guard_neighbours=bool(doc.get("graph", {}).get("guard_neighbours", False)),
        graph=dict(doc["graph"]) if isinstance(doc.get("graph"), dict) else None,
        observation_dtype=doc.get("output", {}).get("observation_dtype"),
        action_dtype=doc.get("output", {}).get("action_dtype"),
        source_goals={str(t["name"]): int(t["goals_per_transition"]) for t in doc.get("sources", [])
                      if isinstance(t, dict) and "goals_per_transition" in t},
        goal_layout=layout,
        heads=_heads(doc) if layout == "heads" else (),
    )
