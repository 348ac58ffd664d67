"""Goal heads: named goal mixtures drawn side by side for one batch of transitions.

A training step of a goal-conditioned method often needs several goals per transition, each
drawn its own way: a value head, a policy head, a subgoal head. A :class:`GoalHead` names one
of them: a mixture over the *goal sources* below, a discount ``gamma`` (for geometric offsets
and for the head's discount weight and return labels), what happens to geometric offsets past
the episode's end, and the step count of subgoals. The recipe's optional ``[heads.NAME]``
tables give the same objects (:func:`heads_from_table`); :class:`goalkit.write.headsampler.HeadSampler`
draws them at training time, and a build with ``[output] goals = "heads"`` writes them as fixed
columns (:mod:`goalkit.pipeline.headcols`; :func:`check_fixed_heads` refuses what a built set
cannot hold, such as in-batch negatives).

For transition ``t`` of an episode with ``T`` transitions (states ``s_0 .. s_T``):

==========  ====  ============================================================================
source      code  goal state
==========  ====  ============================================================================
current     0     ``s_t`` (``j = t``)
future      1     ``j`` uniform on ``{t+1, ..., T}``
geometric   2     ``j = t + K``, ``K ~ Geometric(1 - gamma)`` on ``{1, 2, ...}``; past the end:
                  ``"clip"`` gives ``j = min(t + K, T)``, ``"renormalise"`` draws ``K`` from the
                  law conditioned on ``K <= T - t`` (probability of ``j`` proportional to
                  ``gamma**(j - t)`` on ``{t+1, ..., T}``)
random      3     a state drawn uniformly from every state of the split (any episode)
negative    4     in-batch negative: the geometric goal state of another row of the batch (row
                  ``(i + r) mod B``, ``r`` uniform on ``{1, ..., B-1}``, one ``r`` per head and batch)
final       5     ``j = T``
episode     6     ``j`` uniform on ``{0, ..., T}``
subgoal     7     ``j = min(t + steps, T)``
==========  ====  ============================================================================
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

from goalkit.config import check_keys, closest
from goalkit.errors import ParameterError, RecipeError

#: Goal source name -> code (uint8 in a batch's ``source`` column; never renumbered).
SOURCE_CODES = {"current": 0, "future": 1, "geometric": 2, "random": 3, "negative": 4, "final": 5,
                "episode": 6, "subgoal": 7}
#: Values of a head's ``past_end``.
HEAD_PAST_END = ("clip", "renormalise")
#: Keys of one ``[heads.NAME]`` table.
HEAD_KEYS = ("weights", "gamma", "past_end", "steps")
#: Most heads a built set may carry (each adds a dozen columns).
MAX_FIXED_HEADS = 64
#: Sources a built set cannot draw: in-batch negatives need a batch (a training-time notion).
TRAINING_ONLY_SOURCES = ("negative",)
#: Names a head may not take: the shared columns of a batch.
RESERVED_NAMES = ("observation", "action", "next_observation", "reached_goal", "source_episode",
                  "source_step", "task_reward", "termination", "time_limit", "source")


def _number(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


@dataclass(frozen=True)
class GoalHead:
    """One goal head: a name and a mixture over goal sources.

    Parameters
    ----------
    name : str
        The head's key in a batch (``batch[name]``).
    weights : mapping of str to float
        Source name (:data:`SOURCE_CODES`) -> weight (>= 0, not all zero); normalised.
    gamma : float, default 0.99
        In (0, 1): the geometric sources' discount and the discount of the head's labels
        (discount weight ``gamma**d``, return ``-(1 - gamma**d) / (1 - gamma)``).
    past_end : {"clip", "renormalise"}, default "clip"
        Geometric offsets past the episode's end.
    steps : int, default 25
        ``k`` of the subgoal source (``j = min(t + k, T)``), at least 1.

    Raises
    ------
    ParameterError
        Naming ``GoalHead`` and the parameter (``weights.<source>`` for one weight); the recipe
        loader maps it to the file and key ``heads.NAME.<parameter>``.

    Examples
    --------
    >>> GoalHead("g", {"geometric": 1}, gamma=1.5)
    Traceback (most recent call last):
    ...
    goalkit.errors.ParameterError: GoalHead gamma: expected a number strictly between 0 and 1, got 1.5
    >>> GoalHead("value", {"current": 0.2, "geometric": 0.5, "random": 0.3}).probabilities()
    {'current': 0.2, 'geometric': 0.5, 'random': 0.3}
    """

    name: str
    weights: Mapping[str, float] = field(default_factory=lambda: {"geometric": 1.0})
    gamma: float = 0.99
    past_end: str = "clip"
    steps: int = 25

    def __post_init__(self):
        object.__setattr__(self, "weights", dict(self.weights))
        self._validate()

    def _validate(self) -> None:
        def bad(message, parameter):
            return ParameterError(message, owner="GoalHead", parameter=parameter)

        if not isinstance(self.name, str) or not self.name.isidentifier():
            raise bad(f"expected a head name of letters, digits and _, got {self.name!r}", "name")
        if self.name in RESERVED_NAMES:
            raise bad(f"head name {self.name!r} is a shared column of a batch; reserved: {', '.join(RESERVED_NAMES)}",
                      "name")
        if not self.weights:
            raise bad(f"expected a table of source -> weight; sources: {', '.join(SOURCE_CODES)}", "weights")
        for src, w in self.weights.items():
            if src not in SOURCE_CODES:
                hint = closest(str(src), SOURCE_CODES)
                tip = f"; did you mean '{hint}'?" if hint else ""
                raise bad(f"unknown goal source '{src}'{tip} valid: {', '.join(SOURCE_CODES)}", f"weights.{src}")
            if not _number(w) or w < 0:
                raise bad(f"expected a finite number >= 0, got {w!r}", f"weights.{src}")
        if not any(w > 0 for w in self.weights.values()):
            raise bad("all source weights are zero; give at least one a weight > 0", "weights")
        if not _number(self.gamma) or not 0.0 < self.gamma < 1.0:
            raise bad(f"expected a number strictly between 0 and 1, got {self.gamma!r}", "gamma")
        if self.past_end not in HEAD_PAST_END:
            hint = closest(str(self.past_end), HEAD_PAST_END)
            tip = f"; did you mean '{hint}'?" if hint else ""
            raise bad(f"unknown past_end {self.past_end!r}{tip} valid: {', '.join(HEAD_PAST_END)}", "past_end")
        k = self.steps
        if isinstance(k, bool) or not isinstance(k, int) or k < 1:
            raise bad(f"expected a whole number of steps >= 1, got {k!r}", "steps")

    def probabilities(self) -> dict[str, float]:
        """Source name -> probability, positive weights only, in code order."""
        active = sorted((s for s, w in self.weights.items() if w > 0), key=SOURCE_CODES.__getitem__)
        total = sum(float(self.weights[s]) for s in active)
        return {s: float(self.weights[s]) / total for s in active}

    def describe(self) -> dict:
        """The ``[heads.NAME]`` table that rebuilds this head."""
        return {"weights": {k: float(v) for k, v in self.weights.items()}, "gamma": float(self.gamma),
                "past_end": self.past_end, "steps": int(self.steps)}


def heads_from_table(table: Mapping[str, Any], file=None) -> tuple[GoalHead, ...]:
    """Heads from the recipe's ``[heads]`` table: one ``[heads.NAME]`` sub-table per head.

    Raises
    ------
    RecipeError
        Naming the file and key: a value that is not a table, an unknown key; and every
        :class:`~goalkit.errors.ParameterError` of :class:`GoalHead` (an unknown source, with
        the closest valid one, a negative or all-zero weight, ``gamma`` outside (0, 1), an
        unknown ``past_end``, ``steps`` below 1, a reserved head name), mapped to
        ``heads.NAME.<parameter>``.
    """
    if not isinstance(table, Mapping):
        raise RecipeError(f"expected a table of [heads.NAME] tables, got {table!r}", file=file, key="heads")
    heads = []
    for name, sub in table.items():
        key = f"heads.{name}"
        if not isinstance(sub, Mapping):
            raise RecipeError(f"expected a table [{key}], got {sub!r}", file=file, key=key)
        check_keys(sub, HEAD_KEYS, file=file, section=f"[{key}]", error=RecipeError)
        weights = sub.get("weights", {"geometric": 1.0})
        if not isinstance(weights, Mapping):
            raise RecipeError(f"expected a table of source -> weight, got {weights!r}", file=file,
                              key=f"{key}.weights")
        try:
            heads.append(GoalHead(name, weights, **{k: sub[k] for k in HEAD_KEYS[1:] if k in sub}))
        except ParameterError as exc:  # the head's own parameter -> the recipe's key
            if exc.parameter == "name":  # the name is the table's own key
                raise RecipeError(exc.message, file=file, key=key) from None
            raise exc.in_recipe(file, key) from None
    return tuple(heads)


def check_fixed_heads(heads, file=None) -> None:
    """Refuse heads a built set (``[output] goals = "heads"``) cannot carry.

    A built set has no batches, so a head drawing in-batch negatives (``negative``) is refused
    (:class:`goalkit.write.headsampler.HeadSampler` draws them at training time); so are no
    heads at all and more than :data:`MAX_FIXED_HEADS`.

    Raises
    ------
    RecipeError
        Naming the recipe file and the key (``heads``, ``heads.NAME.weights.negative``).
    """
    if not heads:
        raise RecipeError('goals = "heads" needs at least one [heads.NAME] table', file=file, key="output.goals")
    if len(heads) > MAX_FIXED_HEADS:
        raise RecipeError(f"expected at most {MAX_FIXED_HEADS} heads in a built set, got {len(heads)}", file=file,
                          key="heads")
    for head in heads:
        for src in TRAINING_ONLY_SOURCES:
            if head.weights.get(src, 0) > 0:
                raise RecipeError(f"in-batch negatives exist only at training time (goalkit.HeadSampler): a built "
                                  f"set has no batch; give '{src}' weight 0 here or build with goals = \"slots\"",
                                  file=file, key=f"heads.{head.name}.weights.{src}")
