"""A starter recipe for the user's own logs, from what ``goalkit scan`` found in them.

``goalkit scan LOGS --write-recipe FILE`` writes it. It is the smallest recipe that builds on
those logs, with a comment on every key: the logs as given (relative to the recipe's folder),
the layout (a file written beside it, or the detected one shown as comments), a goal map from
the layout's fields, a relabelling mixture of strategies the logs can serve, and a reward
threshold that is only a placeholder for ``goalkit tune`` to replace.
"""

from __future__ import annotations

import fnmatch
import itertools
import json
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from goalkit.archive import is_pattern
from goalkit.logs.multi import LOG_SUFFIXES

#: Parts of field names that mark rates of change or efforts rather than where things are
#: (a goal is usually where things are; compared in lower case).
RATE_WORDS = ("vel", "speed", "rate", "dot", "acc", "force", "torque", "effort", "current", "jerk")
#: The placeholder threshold is this share of the diagonal of the goal's extent in the logs.
PLACEHOLDER_SHARE = 0.05
#: Most fields searched for a subset as wide as the logs' task goals (2**N subsets).
MAX_FIELDS_SEARCHED = 12


@dataclass(frozen=True)
class GoalChoice:
    """The starter recipe's goal map.

    Attributes
    ----------
    fields : tuple of str
        Layout fields making the goal (empty: ``indices`` is used).
    indices : tuple of int
        Observation columns making the goal (when the layout has no fields).
    columns : tuple of int
        The observation columns the goal takes, in goal order.
    original : bool
        The logs' task goals are as wide as this goal, so the ``original`` strategy can serve.
    why : str
        One comment line saying how the goal was chosen.
    no_original : str
        Why ``original`` is not offered ("" when it is).
    """

    fields: tuple = ()
    indices: tuple = ()
    columns: tuple = ()
    original: bool = False
    why: str = ""
    no_original: str = ""


def _no_original(task_goal_width, width) -> str:
    if task_goal_width is None:
        return "the logs record no task goals"
    if task_goal_width == width:
        return ""
    return f"the logs' task goals have {task_goal_width} columns, this goal {width}"


def _rate_like(name: str) -> bool:
    low = name.lower()
    return any(w in low for w in RATE_WORDS)


def choose_goal(fields: dict, obs_width: int, task_goal_width: int | None) -> GoalChoice:
    """Pick the goal map of a starter recipe.

    Parameters
    ----------
    fields : dict
        Field name -> (first column, end column) in the observation, in layout order.
    obs_width : int
        Observation width.
    task_goal_width : int or None
        Width of the logs' task goals (layout key ``task_goal``), None without them.

    Returns
    -------
    GoalChoice
        With fields: the fields whose names do not read as rates of change or efforts (all
        fields if every one does); when the logs have task goals, the first subset of the fields
        (in layout order, the fewest rate-like fields first) exactly as wide as them, so that
        ``original`` can serve. Without fields: every observation column.
    """
    names = list(fields)
    if not names:
        cols = tuple(range(obs_width))
        why = ("every observation column (the layout names no fields): narrow it to the columns that "
               "say where things are")
        note = _no_original(task_goal_width, obs_width)
        return GoalChoice(indices=cols, columns=cols, original=not note, why=why, no_original=note)

    def cols_of(chosen):
        return tuple(c for n in chosen for c in range(*fields[n]))

    if task_goal_width is not None and len(names) <= MAX_FIELDS_SEARCHED:
        subsets = [s for r in range(1, len(names) + 1) for s in itertools.combinations(names, r)]
        fitting = [s for s in subsets if len(cols_of(s)) == task_goal_width]
        if fitting:
            best = min(fitting, key=lambda s: (sum(_rate_like(n) for n in s), subsets.index(s)))
            return GoalChoice(fields=best, columns=cols_of(best), original=True,
                              why=f"the fields as wide as the logs' task goals ({task_goal_width} columns); "
                                  "check that they are what the task goals describe")
    plain = tuple(n for n in names if not _rate_like(n)) or tuple(names)
    left = [n for n in names if n not in plain]
    why = "the layout's fields" + (f" except the rates of change ({', '.join(left)})" if left else "")
    note = _no_original(task_goal_width, len(cols_of(plain)))
    return GoalChoice(fields=plain, columns=cols_of(plain), original=not note, why=why, no_original=note)


def placeholder_threshold(observation_range: list, columns) -> float:
    """A twentieth of the diagonal of the goal columns' extent in the logs, to 2 significant digits.

    Only a starting value in proportion to the goal space; ``goalkit tune`` chooses one.
    ``observation_range`` is a scan report's list of ``{dim, min, max}``.
    """
    ext = np.array([observation_range[c]["max"] - observation_range[c]["min"] for c in columns], dtype=np.float64)
    diag = float(np.sqrt(np.sum(ext * ext))) if ext.size else 0.0
    value = PLACEHOLDER_SHARE * diag
    if not math.isfinite(value) or value <= 0:
        return 0.01
    return float(f"{value:.2g}")


def _q(text: str) -> str:
    return json.dumps(str(text), ensure_ascii=False)


def _relative(entry: str, folder: str) -> str:
    """``entry`` (a path or glob as given, relative to the current folder) relative to ``folder``."""
    path = os.path.abspath(os.path.expanduser(str(entry)))
    try:
        rel = os.path.relpath(path, folder)
    except ValueError:            # another drive (Windows): keep it absolute
        return path
    return rel.replace(os.sep, "/")


def inline_layout(layout_text: str, prefix: str) -> list[str]:
    """A layout file's TOML text as tables under ``prefix`` (``[logs.layout]``, ``[logs.layout.keys]``, ...)."""
    out = [f"[{prefix}]"]
    for line in layout_text.splitlines():
        m = re.match(r"^(\[\[?)([^\[\]]+)(\]\]?)\s*(#.*)?$", line)
        out.append(f"{m.group(1)}{prefix}.{m.group(2).strip()}{m.group(3)}" if m else line)
    return out


def _read_as_log(path: str, entries) -> bool:
    """Whether a build would read ``path`` as one of the logs (a glob matches it, or it would sit
    directly in a folder of logs with a log file's suffix)."""
    for e in entries:
        e = os.path.abspath(os.path.expanduser(str(e)))
        if is_pattern(e) and fnmatch.fnmatchcase(path, e):
            return True
        if os.path.dirname(path) == e and path.lower().endswith(LOG_SUFFIXES):
            return True
    return False


def output_name(recipe_path, entries) -> str:
    """The set's file name beside the recipe: ``STEM-goals.h5``, or ``STEM.goalset`` when the logs'
    globs or folders would read the former back as a log on the next build."""
    recipe_path = Path(recipe_path)
    folder = os.path.dirname(os.path.abspath(recipe_path))
    for name in (f"{recipe_path.stem}-goals.h5", f"{recipe_path.stem}.goalset"):
        if not _read_as_log(os.path.join(folder, name), entries):
            return name
    return f"{recipe_path.stem}-goals.h5"


def starter_recipe(entries, recipe_path, *, goal: GoalChoice, threshold: float, layout_text: str,
                   layout_file=None, skip_bad_episodes: bool = False, episodes: int = 0,
                   has_success: bool = False) -> str:
    """The text of a starter recipe (see the module docstring).

    Parameters
    ----------
    entries : sequence of str
        The logs as given (files, globs, folders; relative to the current folder).
    recipe_path : str or Path
        Where the recipe goes: paths in it are written relative to its folder.
    goal : GoalChoice
        From :func:`choose_goal`.
    threshold : float
        The placeholder threshold (:func:`placeholder_threshold`).
    layout_text : str
        The layout's TOML text (shown as comments when there is no ``layout_file``).
    layout_file : str or Path, optional
        A layout file for ``[logs] layout`` (written beside the recipe or given by the user).
    skip_bad_episodes : bool
        The scan skipped bad episodes: the recipe does too.
    episodes : int
        Episodes found (in the comment on the split).
    has_success : bool
        The logs have success flags (mentioned for ``goalkit tune --from-success``).

    Returns
    -------
    str
        TOML text that :func:`goalkit.pipeline.recipe.parse_recipe` reads.
    """
    recipe_path = Path(recipe_path)
    folder = os.path.dirname(os.path.abspath(recipe_path))
    paths = [_relative(e, folder) for e in entries]
    name = recipe_path.name
    L = ["# A starter recipe written by `goalkit scan` for the logs below. Every key is explained in",
         "# docs/recipe.md; the tables left out ([mask], [graph], [heads]) are off.",
         f"# Build it with `goalkit build {name}`, then check the set with `goalkit verify`.",
         "version = 1",
         "seed = 0                 # every random draw of the build follows from this number",
         "",
         "[logs]"]
    if len(paths) == 1:
        L.append(f"path = {_q(paths[0])}" + "    # relative to this recipe's folder")
    else:
        L.append("path = [               # files, globs and folders, read in natural order of their names")
        L += [f"  {_q(p)}," for p in paths]
        L.append("]")
    L.append(f"skip_bad_episodes = {'true' if skip_bad_episodes else 'false'}" +
             "    # true: leave out (and count) episodes that fail the checks")
    if layout_file is not None:
        L.append(f"layout = {_q(_relative(layout_file, folder))}" + "    # which array plays which role "
                 "(docs/layout.md)")
    else:
        L += ["", "# The layout: which array plays which role (docs/layout.md). This is the one `goalkit scan`",
              "# proposed for these logs, kept here so that every build reads them the same way; edit it",
              "# in place, or keep it in a file of its own and write `layout = \"FILE\"` under [logs].",
              *inline_layout(layout_text, "logs.layout")]
    L += ["", "[goal]                   # how a state becomes a goal: fields, indices or embedding",
          f"# chosen: {goal.why}"]
    if goal.fields:
        L.append(f"fields = [{', '.join(_q(f) for f in goal.fields)}]")
    else:
        L.append(f"indices = [{', '.join(str(i) for i in goal.indices)}]")
    L += ["dtype = \"float32\"        # how goal vectors are stored (float32 or float64)",
          "", "[relabel]                # which goals each logged transition is paired with (docs/relabel.md)",
          "goals_per_transition = 4 # rows in the set per logged transition",
          "[relabel.weights]        # each goal row picks its strategy with these odds"]
    if goal.original:
        L.append("original = 1             # the goal the logs were recorded for (their task goals)")
    L += ["future = 4               # a state reached later in the same episode",
          "final = 1                # the episode's last state"]
    if not goal.original:
        L.append(f"# original = 1           # not offered: {goal.no_original}")
    L += ["# other_episode = 1      # a state of another episode (needs two or more episodes per split)",
          "", "[reward]                 # when a goal row counts as reached (docs/reward.md)",
          "distance = \"euclidean\"   # distance between the reached goal and the row's goal",
          "# threshold: `goalkit scan` wrote a PLACEHOLDER here (a twentieth of the goal's extent in these",
          f"# logs), not a choice. See distances in proportion with `goalkit tune {name}`, or choose it from",
          "# labelled pairs with `goalkit tune " + name + " --labels PAIRS --write-recipe NEW`"
          + (" (or --from-success)" if has_success and goal.original else "") + "; tune notes its choice",
          "# on the line above the new value.",
          f"threshold = {threshold!r}",
          "inclusive = true         # reached when the distance is at most the threshold",
          "form = \"sparse\"          # reward 1 when reached, else 0",
          "end_on_reach = false     # reaching a goal does not end the episode in the set",
          "", f"[split]                  # {episodes} episodes found; a stable hash of each episode id picks its split",
          "validation = 0.1         # share of episodes held out for validation",
          "", "[output]",
          f"path = {_q(output_name(recipe_path, entries))}" + "    # the set; an existing file is never replaced "
          "without build --replace",
          "mode = \"materialised\"    # every row stores its observations (\"indexed\": rows point into the logs)",
          ""]
    return "\n".join(L)
