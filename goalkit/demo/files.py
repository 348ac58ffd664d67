"""Write the demo's files: HDF5 logs, layout file and recipe, each via a temporary name.

File names inside the output directory: :data:`LOGS_NAME`, :data:`LAYOUT_NAME`,
:data:`RECIPE_NAME`; the recipe's output is :data:`GOALS_NAME`. Files are written through
:mod:`goalkit.outputs`: existing files are replaced only with ``replace`` and only if they are
demo logs (root attribute ``scenario``), a layout file and a recipe respectively.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import h5py
import numpy as np

from goalkit.demo.bench import MAX_TRAYS, GantryParams
from goalkit.demo.controllers import CONTROLLERS
from goalkit.demo.simulate import Rollouts, simulate
from goalkit.demo.tasks import WATER_HOLD, WATER_RADIUS, task_name
from goalkit.errors import GoalkitError
from goalkit.logs.layout import is_layout_file
from goalkit.outputs import discard, open_hdf5, publish, refuse_existing, write_text
from goalkit.pipeline.recipe import is_recipe_file

LOGS_NAME = "gantry-logs.h5"
LAYOUT_NAME = "gantry-layout.toml"
RECIPE_NAME = "gantry-recipe.toml"
GOALS_NAME = "gantry-goals.h5"
#: Parent group of the episode groups in the logs.
EPISODE_PARENT = "bench"
#: Goal fields the recipe uses (observation fields, concatenated in this order).
GOAL_FIELDS = ("head", "trays")
#: Goal-match threshold of the recipe (euclidean, metres, inclusive) = the watering radius.
THRESHOLD = WATER_RADIUS
#: Most time steps per HDF5 chunk.
CHUNK_STEPS = 64
#: Version of the demo's log format (root attribute ``format_version``).
FORMAT_VERSION = 1


@dataclass(frozen=True)
class DemoReport:
    """What :func:`write_demo` wrote.

    Attributes
    ----------
    logs, layout, recipe : str
        Paths of the files written.
    episodes, steps : int
        Episodes and transitions in the logs.
    success_rates : dict of str to float
        Share of successful episodes per controller kind (NaN when a kind ran no episode).
    """

    logs: str
    layout: str
    recipe: str
    episodes: int
    steps: int
    success_rates: dict

    def as_dict(self) -> dict:
        """Return the paths and counts: ``{"logs", "layout", "recipe", "episodes", "steps"}``."""
        return {"logs": self.logs, "layout": self.layout, "recipe": self.recipe,
                "episodes": self.episodes, "steps": self.steps}


#: Root attribute ``scenario`` of the demo logs: what makes an existing logs file "ours".
SCENARIO = "irrigation gantry over a seedling bench"


def is_demo_logs(path) -> bool:
    """True when ``path`` is an HDF5 file written by :func:`write_logs` (its ``scenario`` attribute)."""
    try:
        with h5py.File(path, "r") as f:
            value = f.attrs.get("scenario")
    except (OSError, ValueError):
        return False
    return (value.decode() if isinstance(value, bytes) else value) == SCENARIO


def episode_name(index: int, episodes: int) -> str:
    """Group path of episode ``index``, e.g. ``"bench/ep_00012"`` (zero-padded so names sort)."""
    width = max(5, len(str(max(episodes - 1, 0))))
    return f"{EPISODE_PARENT}/ep_{index:0{width}d}"


def _dataset(group, name, data):
    data = np.ascontiguousarray(data)
    chunks = (min(CHUNK_STEPS, data.shape[0]),) + data.shape[1:]
    group.create_dataset(name, data=data, chunks=chunks, compression="gzip", compression_opts=4,
                         shuffle=True, track_times=False)


def write_logs(path, rollouts: Rollouts, *, advance: Callable[[int], None] | None = None,
               replace: bool = False) -> None:
    """Write rollouts as HDF5 logs, one group per episode (see ``docs/demo.md``).

    Parameters
    ----------
    path : str or Path
        Output file; written under a temporary name in the same directory, then renamed.
    rollouts : Rollouts
        The episodes.
    advance : callable, optional
        Called with 1 after each episode is written (progress).
    replace : bool
        Replace existing demo logs at ``path`` (nothing else there is ever replaced).
    """
    path = Path(path)
    p = rollouts.params
    E = rollouts.num_episodes
    refuse_existing(path, replace=replace, ours=is_demo_logs, what="demo logs")
    tmp, f = open_hdf5(path, libver=("v110", "v110"), track_order=False)
    try:
        with f:
            a = f.attrs
            a["scenario"] = SCENARIO
            a["format_version"] = FORMAT_VERSION
            a["seed"] = rollouts.seed
            a["trays"] = p.trays
            a["dt"] = p.dt
            a["bench_size"] = np.array([p.length, p.depth])
            a["head_height_range"] = np.array([p.z_min, p.z_max])
            a["tray_lanes"] = p.lanes
            a["tray_size"] = np.array([2 * p.tray_half_length, 2 * p.tray_half_depth, p.tray_height])
            a["light_strip"] = np.array(p.strip)
            a["water_radius"] = WATER_RADIUS
            a["water_hold"] = WATER_HOLD
            a["controllers"] = json.dumps(list(CONTROLLERS))
            a["tasks"] = json.dumps([task_name(i, p) for i in range(2 * p.trays)])
            f.create_group(EPISODE_PARENT, track_order=False)
            for e in range(E):  # loop over episodes; each writes whole arrays
                T = int(rollouts.lengths[e])
                g = f.create_group(episode_name(e, E), track_order=False)
                g.attrs["task"] = np.int64(rollouts.tasks[e])
                g.attrs["task_name"] = task_name(rollouts.tasks[e], p)
                g.attrs["controller"] = CONTROLLERS[int(rollouts.controllers[e])]
                _dataset(g, "head", rollouts.head[e, :T + 1])
                _dataset(g, "head_velocity", rollouts.velocity[e, :T + 1])
                _dataset(g, "trays", rollouts.trays[e, :T + 1])
                _dataset(g, "action", rollouts.actions[e, :T].astype(np.float32))
                _dataset(g, "reward", rollouts.success[e, :T].astype(np.float32))
                _dataset(g, "success", rollouts.success[e, :T].astype(np.uint8))
                _dataset(g, "task_goal", np.repeat(rollouts.goals[e][None, :], T, axis=0))
                if rollouts.frames is not None:
                    _dataset(g, "camera", rollouts.frames[e, :T + 1])
                if advance is not None:
                    advance(1)
    except OSError as exc:
        discard(tmp)
        raise GoalkitError(f"cannot write HDF5 ({exc})", file=path) from None
    except BaseException:
        discard(tmp)
        raise
    publish(tmp, path, replace=replace, ours=is_demo_logs, what="demo logs")


def layout_text(frames: bool) -> str:
    """Return the layout file (TOML) describing the demo logs."""
    frame = 'frame = "camera"            # uint8 (T+1, 32, 32) top-down frames\n' if frames else ""
    return f"""\
# Layout of the irrigation-gantry demo logs (written by `goalkit demo`).
version = 1
shape = "grouped"
episode_groups = "{EPISODE_PARENT}/*"

[keys]
action = "action"              # float32 (T, 3) head acceleration commands in [-1, 1]
reward = "reward"              # float32 (T,) 1 on the success step, else 0
success = "success"            # uint8 (T,) task success flag
task = "task"                  # episode attribute: task id (0..K-1 water tray k, K..2K-1 slide tray k)
task_goal = "task_goal"        # float64 (T, 3+K) the task's goal in goal space (head xyz, tray x's)
{frame}
[fields]                       # observation = these fields concatenated, in this order
head = "head"                  # (T+1, 3) head centre x, y, z in metres
head_velocity = "head_velocity"  # (T+1, 3) m/s
trays = "trays"                # (T+1, K) tray centres along x in metres
"""


def recipe_text(seed: int) -> str:
    """Return the demo recipe (TOML) for the logs written next to it."""
    fields = json.dumps(list(GOAL_FIELDS))
    return f"""\
# Recipe for the irrigation-gantry demo (written by `goalkit demo`); see docs/demo.md.
version = 1
seed = {int(seed)}

[logs]
path = "{LOGS_NAME}"
layout = "{LAYOUT_NAME}"
skip_bad_episodes = false

[goal]
fields = {fields}       # head x, y, z and the tray centres: the goal space of the tasks
dtype = "float32"

[relabel]
goals_per_transition = 5
gamma = 0.9
[relabel.weights]
original = 1
final = 1
future = 2
geometric = 1

[reward]
distance = "euclidean"
threshold = {THRESHOLD!r}               # metres: the watering radius, so "reached" matches watering
inclusive = true
form = "sparse"
end_on_reach = false

[split]
validation = 0.1
salt = 0

[output]
path = "{GOALS_NAME}"
mode = "materialised"
compression = "gzip"
chunk_rows = 65536
"""


def _check(episodes, seed, trays):
    def whole(value, name, low, high=None):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
            raise GoalkitError(f"expected an integer, got {value!r}", key=name)
        if value < low or (high is not None and value > high):
            rng_ = f"{low}..{high}" if high is not None else f">= {low}"
            raise GoalkitError(f"expected an integer {rng_}, got {value}", key=name)
    whole(episodes, "episodes", 1)
    whole(seed, "seed", 0, 2**63 - 1)
    whole(trays, "trays", 1, MAX_TRAYS)


def write_demo(directory, episodes: int = 200, seed: int = 0, frames: bool = False, trays: int = 3,
               *, advance: Callable[[int], None] | None = None, replace: bool = False) -> DemoReport:
    """Simulate the bench and write logs, layout and recipe into ``directory``.

    Parameters
    ----------
    directory : str or Path
        Output directory (created if missing).
    episodes : int
        Number of episodes.
    seed : int
        Seed (same seed, same bytes).
    frames : bool
        Also store 32 x 32 camera frames.
    trays : int
        Number of trays ``K`` (1 to 6).
    advance : callable, optional
        Progress callback, called with 1 per episode written.
    replace : bool
        Replace the demo's files when they already exist (only demo logs, a layout file and a
        recipe; anything else at those names is never replaced). Without it an existing file
        is refused before anything is simulated.

    Returns
    -------
    DemoReport

    Raises
    ------
    GoalkitError
        On a bad argument or when the directory cannot be written.
    """
    _check(episodes, seed, trays)
    out = Path(directory)
    if out.exists() and not out.is_dir():
        raise GoalkitError("expected a directory, found a file", file=out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise GoalkitError(f"cannot create directory ({exc.strerror or exc})", file=out) from None
    logs, layout, recipe = out / LOGS_NAME, out / LAYOUT_NAME, out / RECIPE_NAME
    for path, ours, what in ((logs, is_demo_logs, "demo logs"), (layout, is_layout_file, "demo file"),
                             (recipe, is_recipe_file, "demo file")):
        refuse_existing(path, replace=replace, ours=ours, what=what)
    rollouts = simulate(int(episodes), int(seed), GantryParams(trays=int(trays)), frames=frames)
    write_logs(logs, rollouts, advance=advance, replace=replace)
    write_text(layout, layout_text(frames), replace=replace, ours=is_layout_file, what="demo file")
    write_text(recipe, recipe_text(seed), replace=replace, ours=is_recipe_file, what="demo file")
    rates = {c: rollouts.success_rate(c) for c in CONTROLLERS}
    return DemoReport(logs=str(logs), layout=str(layout), recipe=str(recipe),
                      episodes=int(episodes), steps=int(rollouts.lengths.sum()), success_rates=rates)


def make_demo(directory, episodes: int = 200, seed: int = 0, frames: bool = False,
              trays: int = 3, replace: bool = False) -> dict:
    """Write the irrigation-gantry demo into ``directory`` and return what was written.

    Parameters
    ----------
    directory : str or Path
        Output directory (created if missing).
    episodes : int
        Number of episodes.
    seed : int
        Seed; the same seed gives byte-identical files.
    frames : bool
        Also store 32 x 32 uint8 top-down camera frames (key ``camera``).
    trays : int
        Number of seedling trays (1 to 6).
    replace : bool
        Replace the demo's files when they already exist (see :func:`write_demo`).

    Returns
    -------
    dict
        ``{"logs": path, "layout": path, "recipe": path, "episodes": int, "steps": int}``.

    Examples
    --------
    >>> import tempfile
    >>> out = make_demo(tempfile.mkdtemp(), episodes=5, seed=1)
    >>> out["episodes"], sorted(out)
    (5, ['episodes', 'layout', 'logs', 'recipe', 'steps'])
    """
    return write_demo(directory, episodes, seed, frames, trays, replace=replace).as_dict()
