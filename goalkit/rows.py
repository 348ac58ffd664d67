"""The goal row: one definition of every column a built set stores, and of its splits.

A goal row is one (transition, goal) pair. :data:`INDEX_FIELDS` are stored in every set,
:data:`MATERIAL_FIELDS` only in materialised sets, :data:`TASK_REWARD_FIELD` when the logs
carry a task reward. The builder (:mod:`goalkit.pipeline.chunk`), the file format
(:mod:`goalkit.write.format`), the relabelling rows (:class:`goalkit.relabel.GoalRows`) and the
sampler (:mod:`goalkit.write.sampler`) take their column names from here, and the column table
of docs/dataset.md is checked against it by a test.

This module states *what* a row holds, not the rules its values obey: those live with the
strategies (:data:`goalkit.relabel.STRATEGIES`) and the reward rule (:func:`goalkit.reward.score`).
"""

from __future__ import annotations

from dataclasses import dataclass

#: Split names, in code order (code = position), as stored in every set.
SPLITS = ("train", "validation")
#: Split name -> code.
SPLIT_CODES = {name: code for code, name in enumerate(SPLITS)}

#: Per-row shape kinds: "" one value per row, "goal" (G,), "obs" (D,), "act" (A,).
SHAPE_KINDS = {"": "(M,)", "goal": "(M, G)", "obs": "(M, D)", "act": "(M, A)"}


@dataclass(frozen=True)
class Field:
    """One column of a goal row.

    Attributes
    ----------
    name : str
        Column name in the set.
    dtype : str
        A numpy dtype name, or ``"goal"`` (the recipe's goal dtype), ``"obs"`` / ``"act"``
        (the stored observation / action dtype: the recipe's ``[output] observation_dtype`` /
        ``action_dtype``, else the logs').
    kind : str
        Per-row shape kind, a key of :data:`SHAPE_KINDS`.
    meaning : str
        What the value is (the text of docs/dataset.md's column table).
    """

    name: str
    dtype: str
    kind: str
    meaning: str

    @property
    def shape_text(self) -> str:
        """The column's shape as docs/dataset.md writes it, e.g. ``(M, G)``."""
        return SHAPE_KINDS[self.kind]

    @property
    def dtype_text(self) -> str:
        """The dtype as docs/dataset.md writes it (``goal dtype``, ``observation dtype``, ``action dtype``
        or a numpy name)."""
        return {"goal": "goal dtype", "obs": "observation dtype", "act": "action dtype"}.get(self.dtype, self.dtype)


def _fields(*rows) -> dict[str, Field]:
    return {name: Field(name, dtype, kind, meaning) for name, dtype, kind, meaning in rows}


#: Columns of every set, in the order they are written.
INDEX_FIELDS = _fields(
    ("source_episode", "int64", "", "episode id of the transition (its position in the log)"),
    ("source_step", "int64", "", "t, for transition (s_t, a_t, s_t+1)"),
    ("slot", "int64", "", "goal slot 0 .. goals_per_transition-1 (of the transition's source)"),
    ("strategy", "uint8", "", "strategy code (table below)"),
    ("goal_episode", "int64", "", "episode id the goal state comes from; -1 for an external goal"),
    ("goal_step", "int64", "", "j, the goal is phi(s_j); -1 for an external goal"),
    ("hop_episode", "int64", "", "neighbour and near-miss goals: episode of the neighbour state found; else -1"),
    ("hop_step", "int64", "", "neighbour and near-miss goals: step of the neighbour state found; else -1"),
    ("join_step", "int64", "", "neighbour, library and near-miss goals: the own step j they are joined at "
                               "(-1 for an unmatched library goal); else -1"),
    ("steps_to_goal", "int64", "", "j - t when the goal is a later state of the same episode, else -1"),
    ("goal", "goal", "goal", "g"),
    ("goal_distance", "float32", "", "distance(phi(s_t+1), g) under the reward rule"),
    ("reward", "float32", "", "R(phi(s_t+1), g)"),
    ("reached", "uint8", "", "1 when phi(s_t+1) is within the threshold of g"),
    ("terminal", "uint8", "", "1 when the episode ends for this goal (`end_on_reach`); time limits are "
                              "never terminal"),
    # ---- training labels (discount gamma: the recipe's [relabel] gamma; d = steps_to_goal) ----
    ("discount_weight", "float32", "", "gamma**d, the discounted relabelling weight; 0 when steps_to_goal "
                                       "is -1"),
    ("return_to_goal", "float32", "", "-(1 - gamma**d) / (1 - gamma), the return of reward -1 per step over "
                                      "the d steps to the goal; -1 / (1 - gamma) when steps_to_goal is -1"),
    ("bootstrap_mask", "uint8", "", "1 - terminal: 0 only when the goal is reached and `end_on_reach` ends "
                                    "the episode; a time limit never clears it"),
)

#: Extra columns of a materialised set, in the order they are written.
MATERIAL_FIELDS = _fields(
    ("observation", "obs", "obs", "s_t (materialised mode only)"),
    ("action", "act", "act", "a_t (materialised mode only)"),
    ("next_observation", "obs", "obs", "s_t+1 (materialised mode only)"),
    ("reached_goal", "goal", "goal", "phi(s_t+1) (materialised mode only)"),
)

#: Optional column, present when the logs carry a task reward.
TASK_REWARD_FIELD = Field("task_reward", "float32", "",
                          "the log's own reward of the transition (when the logs have one)")

# ---- the environment's own end flags and the log source (issue 12) -----------------------
#: Optional columns, present when the layout maps the environment's termination and time-limit
#: flags (roles ``termination`` and ``time_limit``): facts about the logged transition, the same
#: for every goal slot, and distinct from the goal-reached ``terminal``. Bootstrapping convention
#: (Pardo et al., 2018, "Time Limits in Reinforcement Learning"): a time limit is never terminal.
END_FLAG_FIELDS = _fields(
    ("termination", "uint8", "", "1 when the environment ended the episode at s_t+1 (the log's "
                                 "termination flag; only on an episode's last transition)"),
    ("time_limit", "uint8", "", "1 when a time limit cut the episode after this transition (the log's "
                                "time-limit flag); never a terminal: bootstrap from s_t+1"),
)
#: EpisodeSet attribute of each end-flag column.
END_FLAG_SOURCES = {"termination": "terminations", "time_limit": "time_limits"}
#: Optional column, present when the recipe names its sources (``[[sources]]``).
SOURCE_FIELD = Field("source", "uint16", "", "the log source of the transition: its position in the recipe's "
                                             "[[sources]] (names in the provenance)")
# ---- end of the end-flag and source block ------------------------------------------------
#: Optional column, present when the recipe has a ``[mask]`` table (goal masks, goalkit.masks).
GOAL_MASK_FIELD = Field("goal_mask", "uint8", "goal",
                        "1 for each goal dimension the goal constrains (reward, reached and distance use "
                        "only these; recipes with a [mask] table only)")
# ---- graph distances (issue 15): one block, present when the recipe has a [graph] table ----
#: Optional column: steps from s_t+1 to the goal state in the logs' graph (goalkit.goals.stategraph).
GRAPH_STEPS_FIELD = Field("graph_steps", "int64", "",
                          "shortest path in the logs' graph (logged steps and joins) from s_t+1 to the goal "
                          "state; -2 no path within the horizon, -1 not computed (with a [graph] table)")
# ---- end of graph distances ----

# ---- goal heads in a built set (issue 13): present when the recipe says [output] goals = "heads" ----
#: Separator of a head column's name: ``FIELD@HEAD`` (for example ``goal@value``).
HEAD_SEPARATOR = "@"
#: Columns written once per head, in this order, named ``FIELD@HEAD`` (:func:`head_column`); the
#: labels use the head's own ``gamma``.
HEAD_FIELDS = _fields(
    ("source", "uint8", "", "goal source code of the head's goal (goal source table below)"),
    ("goal_episode", "int64", "", "episode id the head's goal state comes from"),
    ("goal_step", "int64", "", "j, the head's goal is phi(s_j)"),
    ("steps_to_goal", "int64", "", "j - t when the goal is state j >= t of the same episode (0 for a current "
                                   "goal), else -1"),
    ("goal", "goal", "goal", "the head's goal g = phi(s_j)"),
    ("goal_distance", "float32", "", "distance(phi(s_t+1), g) under the reward rule"),
    ("reward", "float32", "", "R(phi(s_t+1), g)"),
    ("reached", "uint8", "", "1 when phi(s_t+1) is within the threshold of g"),
    ("terminal", "uint8", "", "1 when the goal is reached and `end_on_reach` ends the episode"),
    ("discount_weight", "float32", "", "gamma_h**d (d = steps_to_goal, gamma_h the head's gamma); 0 when d is -1"),
    ("return_to_goal", "float32", "", "-(1 - gamma_h**d) / (1 - gamma_h); -1 / (1 - gamma_h) when d is -1"),
    ("bootstrap_mask", "uint8", "", "1 - terminal"),
)
#: Per-head goal mask, present with a ``[mask]`` table.
HEAD_MASK_FIELD = Field("goal_mask", "uint8", "goal", "1 for each goal dimension the head's goal constrains "
                                                      "(recipes with a [mask] table only)")


def head_column(field: str, head: str) -> str:
    """The stored name of column ``field`` of head ``head``: ``"goal", "value"`` -> ``"goal@value"``."""
    return f"{field}{HEAD_SEPARATOR}{head}"
# ---- end of goal heads ----

#: The columns a relabelling strategy fills (the rest come from the logs and the reward rule).
GOAL_ADDRESS = ("goal_episode", "goal_step", "hop_episode", "hop_step", "join_step", "steps_to_goal")
#: The columns :func:`goalkit.reward.score` fills, in this order.
SCORE_COLUMNS = ("goal_distance", "reward", "reached", "terminal")
#: The training-label columns (:func:`goalkit.pipeline.chunk.row_labels` fills them), in this order.
LABEL_COLUMNS = ("discount_weight", "return_to_goal", "bootstrap_mask")

#: Every column, by name.
ALL_FIELDS = {**INDEX_FIELDS, **MATERIAL_FIELDS, TASK_REWARD_FIELD.name: TASK_REWARD_FIELD,
              **END_FLAG_FIELDS, SOURCE_FIELD.name: SOURCE_FIELD,
              GOAL_MASK_FIELD.name: GOAL_MASK_FIELD,
              GRAPH_STEPS_FIELD.name: GRAPH_STEPS_FIELD}
