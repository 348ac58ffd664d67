"""What a build knows before it reads a single chunk: the plan shared by every chunk task.

A :class:`BuildPlan` is small, picklable and the same for every worker: the recipe, the goal
map, the per-episode split, the relabelling context and the column layout. Chunk tasks
(:func:`goalkit.pipeline.chunk.relabel_chunk`) are pure functions of the plan and a chunk.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from goalkit.errors import ParameterError, RecipeError
from goalkit.goals.stategraph import StateGraph
from goalkit.logs import open_logs
from goalkit.logs.episodes import chunk_bounds, kept_task_ids
from goalkit.logs.layout import load_layout
from goalkit.masks import field_groups
from goalkit.pipeline.casts import StoredDtypes, file_table
from goalkit.pipeline.goal import make_goal_map
from goalkit.pipeline.headcols import head_columns_spec
from goalkit.pipeline.headcols import needs_goal_table as heads_need_table
from goalkit.pipeline.searchsetup import attach_searches
from goalkit.pipeline.sharedread import shared_chunks
from goalkit.pipeline.split import split_codes
from goalkit.relabel import RelabelContext
from goalkit.relabel.strategies import STRATEGIES
from goalkit.relabel.strategies import strategy_names as table_names
from goalkit.rows import END_FLAG_SOURCES, GRAPH_STEPS_FIELD, SPLITS
from goalkit.logs.multi import open_sources
from goalkit.write.format import (END_FLAG_COLUMNS, GOAL_MASK_COLUMN, INDEX_COLUMNS, MATERIAL_COLUMNS, SOURCE_COLUMN,
                                   TASK_REWARD_COLUMN)

#: Row keys are ``global transition index * SLOT_SPAN + slot``.
SLOT_SPAN = 1 << 16


@dataclass(frozen=True)
class BuildPlan:
    """Everything a chunk task needs besides its chunk.

    Attributes
    ----------
    recipe : Recipe
    goal_map : GoalMap
    episode_ids : ndarray of int64
        Ids of the episodes kept from the log, increasing.
    lengths : ndarray of int64
        Their transition counts.
    transition_offsets : ndarray of int64
        ``E + 1`` global transition offsets over the kept episodes.
    splits : ndarray of int8
        Split code of each kept episode (0 train, 1 validation).
    context : RelabelContext
        What cross-episode strategies need.
    goal_table : ndarray or None
        phi of every kept state (global state rows), when a strategy takes goals from other
        episodes; None otherwise.
    columns : dict
        Column name -> (dtype, per-row shape) of the output.
    shapes : dict or None
        Per-row shapes ``{"observation", "action", "goal"}`` of the logs and the goal map (lists).
    masks : goalkit.masks.GoalMasks or None
        The recipe's mask table matched with the goal space and the logs' tasks (None: no
        ``[mask]`` table).
    graph : goalkit.goals.stategraph.StateGraph or None
        The logs' graph, when the recipe has a ``[graph]`` table.
    dtypes : goalkit.pipeline.casts.StoredDtypes or None
        The stored observation, action and goal dtypes and the checked cast to them.
    goals : ndarray of int64 or None
        Goal rows per transition of each kept episode, when sources give their own
        (``Recipe.source_goals``); None: ``goals_per_transition`` for every episode.
    """

    recipe: object
    goal_map: object
    episode_ids: np.ndarray
    lengths: np.ndarray
    transition_offsets: np.ndarray
    splits: np.ndarray
    context: object
    goal_table: np.ndarray | None
    columns: dict
    shapes: dict | None = None
    masks: object = None
    graph: object = None
    dtypes: object = None
    goals: np.ndarray | None = None

    def positions(self, episode_ids) -> np.ndarray:
        """Position among the kept episodes of each episode id."""
        return np.searchsorted(self.episode_ids, np.asarray(episode_ids, dtype=np.int64))

    def global_state_rows(self, episode_ids, steps) -> np.ndarray:
        """Row in :attr:`goal_table` of state ``steps`` of each episode id."""
        pos = self.positions(episode_ids)
        return self.transition_offsets[pos] + pos + np.asarray(steps, dtype=np.int64)

    @property
    def total_transitions(self) -> int:
        return int(self.transition_offsets[-1])

    def episode_goals(self) -> np.ndarray:
        """Goal rows per transition of each kept episode (int64)."""
        if self.goals is not None:
            return self.goals
        return np.full(len(self.episode_ids), int(self.recipe.mixture.goals_per_transition), np.int64)

    @property
    def total_rows(self) -> int:
        """Rows of the whole set (both splits)."""
        return int(np.sum(self.lengths * self.episode_goals()))

    @property
    def most_goals(self) -> int:
        """The largest number of goal rows a transition gets (at least 1)."""
        return max(1, int(self.episode_goals().max(initial=0)))


def _columns(recipe, obs_shape, act_shape, obs_dtype, act_dtype, goal_dim, has_task_reward, end_flags=(),
             has_source=False) -> dict:
    goal_dtype = np.dtype(recipe.goal.dtype)
    kinds = {"goal": (goal_dtype, (goal_dim,)), "obs": (obs_dtype, obs_shape), "act": (act_dtype, act_shape)}
    cols = {}
    for name, (dtype, kind, _) in INDEX_COLUMNS.items():
        cols[name] = kinds[dtype] if dtype in kinds else (np.dtype(dtype), ())
    if recipe.output.mode == "materialised":
        for name, (dtype, kind, _) in MATERIAL_COLUMNS.items():
            cols[name] = kinds[kind]
    if has_task_reward:
        cols[TASK_REWARD_COLUMN[0]] = (np.dtype(TASK_REWARD_COLUMN[1]), ())
    for name, (dtype, _) in END_FLAG_COLUMNS.items():
        if name in end_flags:
            cols[name] = (np.dtype(dtype), ())
    if has_source:
        cols[SOURCE_COLUMN[0]] = (np.dtype(SOURCE_COLUMN[1]), ())
    if recipe.masks is not None:
        cols[GOAL_MASK_COLUMN[0]] = (np.dtype(GOAL_MASK_COLUMN[1]), (goal_dim,))
    if getattr(recipe, "graph", None) is not None:
        cols[GRAPH_STEPS_FIELD.name] = (np.dtype(GRAPH_STEPS_FIELD.dtype), ())
    if recipe.output.goals == "heads":
        cols.update(head_columns_spec(recipe.heads, goal_dtype, goal_dim, recipe.masks is not None))
    return cols


def resolve_masks(recipe, source, first, goal_dim: int, max_transitions: int):
    """The recipe's ``[mask]`` table matched with the goal space and the logs' tasks (or None).

    When the table names tasks, the task ids of every kept episode are looked up first (known
    from opening the logs for every per-episode reader; other logs are read once), so that a
    task the logs do not have is refused before anything is written.
    """
    spec = recipe.masks
    if spec is None:
        return None
    groups = field_groups(recipe.goal.fields, first.fields) if recipe.goal.fields else ()
    tasks = None
    if spec.tasks and first.task_ids is not None:
        known = kept_task_ids(source, max_transitions)
        tasks = np.zeros(0, np.int64) if known is None else np.unique(known)
    try:
        return spec.resolve(goal_dim, groups, tasks)
    except ParameterError as exc:  # the table's key -> the recipe's file and mask.<key>
        raise exc.in_recipe(recipe.file, "mask") from None


#: Strategies whose goals may come from episodes outside the chunk.


@dataclass(frozen=True)
class _SplitLookup:
    """split_of(ids) for a context: the split code of each kept episode id."""

    ids: np.ndarray
    codes: np.ndarray

    def __call__(self, episode_ids):
        return self.codes[np.searchsorted(self.ids, np.asarray(episode_ids, dtype=np.int64))]


def active_strategies(mixture) -> list[str]:
    """Names of the strategies with positive weight."""
    return [n for n, w in mixture.weights.items() if w > 0]


def needs_goal_table(mixture) -> bool:
    """True when a strategy of the mixture takes goals from other episodes (or matches a library)."""
    return any(STRATEGIES[n].goal_table for n in active_strategies(mixture))


def strategy_names(mixture) -> dict:
    """Strategy code -> name of every strategy in the strategy table."""
    return table_names()


def check_mixture(recipe, first, context, goal_dim: int) -> None:
    """Refuse a mixture the logs cannot serve, before anything is written."""
    active = active_strategies(recipe.mixture)
    if "original" in active and first.task_goals is None:
        raise RecipeError("strategy 'original' needs the log's own task goals, but the layout maps no "
                          "task_goal key; give it a weight of 0 or add [keys] task_goal to the layout",
                          file=recipe.file, key="relabel.weights.original")
    if "original" in active and first.task_goals.shape[1] != goal_dim:
        raise RecipeError(f"strategy 'original' uses the log's task goals as goals, but they have "
                          f"{first.task_goals.shape[1]} columns and the goal map gives {goal_dim}; the task goals "
                          f"must be in the recipe's goal space (give 'original' a weight of 0 with an embedding "
                          f"goal map)", file=recipe.file, key="relabel.weights.original")
    if "other_episode" in active:
        for code, ids in context.split_episode_ids.items():
            if len(ids) < 2:
                name = SPLITS[code]
                raise RecipeError(f"strategy 'other_episode' needs at least 2 episodes in every split; the "
                                  f"{name} split has {len(ids)}", file=recipe.file,
                                  key="relabel.weights.other_episode")


def open_source(recipe):
    """Open the recipe's logs with its layout (several files or sources: one MultiSource)."""
    if recipe.sources is not None:
        return open_sources(recipe.sources, named=recipe.named_sources, file=recipe.file)

    layout = None
    if recipe.layout_path is not None:
        layout = load_layout(recipe.layout_path)
    return open_logs(recipe.logs_path, layout, skip_bad_episodes=recipe.skip_bad_episodes)


def make_plan(recipe, source=None, max_transitions: int = 200_000) -> tuple[BuildPlan, object]:
    """Prepare a build: open the logs, check the recipe against them, split, build the context.

    Parameters
    ----------
    recipe : Recipe
    source : LogSource, optional
        Already opened logs (default: open ``recipe.logs_path``).
    max_transitions : int
        Chunk size used when the goal table has to be computed.

    Returns
    -------
    (BuildPlan, LogSource)
    """
    source = source if source is not None else open_source(recipe)
    ids = np.asarray(source.episode_ids, dtype=np.int64)
    lengths = np.asarray(source.lengths, dtype=np.int64)
    if len(ids) == 0:
        raise RecipeError("the logs hold no usable episode", file=source.path)
    first = source.read(0, 1)
    obs_shape, act_shape = first.observations.shape[1:], first.actions.shape[1:]
    goal_map = make_goal_map(recipe.goal, source, obs_shape[0] if obs_shape else 0, file=recipe.file)
    try:
        recipe.reward.check_dim(goal_map.dim)
    except ParameterError as exc:
        raise exc.in_recipe(recipe.file, "reward") from None
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    splits = split_codes(ids, recipe.validation, recipe.salt)
    context = RelabelContext({c: ids[splits == c] for c in np.unique(splits).tolist()},
                             {c: lengths[splits == c] for c in np.unique(splits).tolist()},
                             _SplitLookup(ids, splits))
    check_mixture(recipe, first, context, goal_map.dim)
    masks = resolve_masks(recipe, source, first, goal_map.dim, max_transitions)
    dtypes = stored_dtypes(recipe, source, first)
    cols = _columns(recipe, obs_shape, act_shape, dtypes.observation, dtypes.action,
                    goal_map.dim, first.rewards is not None,
                    [name for name, attr in END_FLAG_SOURCES.items() if getattr(first, attr) is not None],
                    bool(recipe.named_sources))
    table = None
    heads_table = recipe.output.goals == "heads" and heads_need_table(recipe.heads)
    if needs_goal_table(recipe.mixture) or recipe.graph is not None or heads_table:
        table = goal_table(source, goal_map, dtypes, max_transitions)
    if table is not None:
        context = attach_searches(recipe, context, table, goal_map, ids, lengths, splits)
    graph = None
    if recipe.graph is not None:  # the logs' graph over every kept state (both splits)
        settings = replace(recipe.graph.settings, seed=recipe.seed)
        graph = StateGraph.from_logs(table, offsets, settings, episode_ids=ids)
        if recipe.graph.guard_neighbours:
            context = replace(context, graph=graph)
    goals = None
    if getattr(recipe, "source_goals", None) is not None:   # per-source goal rows (docs/recipe.md)
        goals = np.asarray(recipe.source_goals, dtype=np.int64)[np.asarray(source.source_of(ids), dtype=np.int64)]
    plan = BuildPlan(recipe=recipe, goal_map=goal_map, episode_ids=ids, lengths=lengths,
                     transition_offsets=offsets, splits=splits, context=context, goal_table=table,
                     columns=cols, shapes={"observation": list(obs_shape), "action": list(act_shape),
                                           "goal": [int(goal_map.dim)]},
                     masks=masks, graph=graph, dtypes=dtypes, goals=goals)
    return plan, source


def stored_dtypes(recipe, source, first) -> StoredDtypes:
    """The dtypes a build of ``recipe`` stores (the recipe's, else the logs'), checked against the logs.

    Raises
    ------
    RecipeError
        An integer ``action_dtype`` for logs whose actions are floats.
    """
    out = recipe.output
    log_act = np.dtype(getattr(source, "action_dtype", first.actions.dtype))
    obs = np.dtype(out.observation_dtype or getattr(source, "obs_dtype", first.observations.dtype))
    act = np.dtype(out.action_dtype) if out.action_dtype else log_act
    if act.kind in "iu" and log_act.kind not in "iub":
        raise RecipeError(f"the logs' actions are {log_act.name}; an integer action dtype ({act.name}) would "
                          f"drop their fractions; expected a float dtype (float16, float32, float64)",
                          file=recipe.file, key="output.action_dtype")
    return StoredDtypes(observation=obs, action=act, goal=np.dtype(recipe.goal.dtype), files=file_table(source),
                        recipe_file=str(recipe.file))


#: Transitions per chunk of the goal table's read (at most; ``max_transitions`` if smaller).
TABLE_CHUNK_TRANSITIONS = 25_000


def goal_table(source, goal_map, dtypes, max_transitions: int) -> np.ndarray:
    """phi of every kept state of the log, in global state-row order, cast (checked) to the goal dtype.

    ``dtypes`` is the plan's :class:`StoredDtypes` (or a bare dtype: cast unchecked).
    """
    if not isinstance(dtypes, StoredDtypes):
        dtypes = StoredDtypes(observation=np.dtype(np.float64), action=np.dtype(np.float64), goal=np.dtype(dtypes),
                              files=file_table(source))
    lengths = np.asarray(source.lengths, dtype=np.int64)
    total = int(lengths.sum() + len(lengths))
    out = np.empty((total, goal_map.dim), dtype=dtypes.goal)
    # chunks small enough to share with the helper (the table's values do not depend on them)
    bounds = chunk_bounds(lengths, min(max_transitions, TABLE_CHUNK_TRANSITIONS))
    # each chunk's first state row: its episodes' states (T + 1 each) come after the earlier ones'
    states = np.concatenate([[0], np.cumsum(lengths + 1)]).astype(np.int64)

    def fill(k, chunk):
        a, b = bounds[k]
        row, n = int(states[a]), chunk.observations.shape[0]
        if n != int(states[b] - states[a]):
            raise ValueError(f"chunk {k} holds {n} states, its episodes {int(states[b] - states[a])}")
        out[row:row + n] = dtypes.cast(np.asarray(goal_map(chunk, np.arange(n))), "goal", "goal.dtype", chunk,
                                       state_level=True)

    shared_chunks(source, bounds, fill)     # half of it read by the spare helper meanwhile
    return out


def split_rows(plan) -> dict:
    """Rows each split of the output will hold: each transition's goal count (per source) per transition."""
    rows = plan.lengths * plan.episode_goals()
    return {name: int(rows[plan.splits == code].sum()) for code, name in enumerate(SPLITS)}
