"""Names, dtypes and version of goalkit's dataset layout (documented in docs/dataset.md).

A built set is one HDF5 file::

    /                     attributes: format, format_version, goalkit_version, mode, seed,
                          recipe (TOML text), provenance (JSON), summary (JSON), manifest (JSON),
                          seal (format version 2)
    /train/<column>       one row per (transition, goal) pair, rows sorted by
    /validation/<column>  (source_episode, source_step, slot); group attributes rows, episodes

Every column is chunked along rows. ``manifest`` maps ``"split/column"`` to the SHA-256 of the
column's bytes in C order, so a reader can check any array without trusting the file. ``seal``
is the SHA-256 of every attribute and every column's dtype, shape and storage (see
:mod:`goalkit.write.seal`). Version 1 sets (no seal) are still read and verified.
"""

from __future__ import annotations

FORMAT_NAME = "goalkit-goal-set"
FORMAT_VERSION = 2
SPLITS = ("train", "validation")
SPLIT_CODES = {"train": 0, "validation": 1}

#: Columns present in every mode: name -> (dtype, per-row shape kind, meaning).
#: Shape kind "" is a scalar per row, "goal" is (G,), "obs" is (D,), "act" is (A,).
INDEX_COLUMNS = {
    "source_episode": ("int64", "", "episode id of the transition"),
    "source_step": ("int64", "", "step t of the transition (s_t, a_t, s_t+1)"),
    "slot": ("int64", "", "goal slot of the transition, 0 .. goals_per_transition - 1"),
    "strategy": ("uint8", "", "relabelling strategy code (see the strategy table)"),
    "goal_episode": ("int64", "", "episode id the goal was taken from, -1 when external"),
    "goal_step": ("int64", "", "step j of the goal state s_j, -1 when external"),
    "hop_episode": ("int64", "", "neighbour goals: the episode joined through, else -1"),
    "hop_step": ("int64", "", "neighbour goals: the step joined at, else -1"),
    "join_step": ("int64", "", "neighbour, library, near-miss goals: own step j joined at, else -1"),
    "steps_to_goal": ("int64", "", "j - t for goals from the same episode, else -1"),
    "goal": ("goal", "goal", "the goal vector g"),
    "goal_distance": ("float32", "", "distance between phi(s_t+1) and g under the reward rule"),
    "reward": ("float32", "", "reward R(phi(s_t+1), g)"),
    "reached": ("uint8", "", "1 when phi(s_t+1) is within the threshold of g"),
    "terminal": ("uint8", "", "1 when the episode ends here for this goal (end_on_reach)"),
}

#: Extra columns of a materialised set.
MATERIAL_COLUMNS = {
    "observation": ("obs", "obs", "s_t"),
    "action": ("act", "act", "a_t"),
    "next_observation": ("obs", "obs", "s_t+1"),
    "reached_goal": ("goal", "goal", "phi(s_t+1)"),
}

#: Optional column, present when the logs carry a task reward.
TASK_REWARD_COLUMN = ("task_reward", "float32", "the log's own task reward of the transition")


def column_names(mode: str, has_task_reward: bool) -> list[str]:
    """Return the column names of a set in ``mode``, in the order they are written."""
    names = list(INDEX_COLUMNS)
    if mode == "materialised":
        names += list(MATERIAL_COLUMNS)
    if has_task_reward:
        names.append(TASK_REWARD_COLUMN[0])
    return names


def is_goal_set(path) -> bool:
    """True when ``path`` is an HDF5 file whose root attribute ``format`` is :data:`FORMAT_NAME`.

    This is what makes an existing file "ours": only such a file is replaced by a build, and only
    when replacing is asked for (``--replace``).
    """
    import h5py

    try:
        with h5py.File(path, "r") as f:
            fmt = f.attrs.get("format")
    except (OSError, ValueError):
        return False
    if isinstance(fmt, bytes):
        fmt = fmt.decode("utf-8", "replace")
    return fmt == FORMAT_NAME
