"""The recipe file: everything a build needs, in one TOML document (see docs/recipe.md).

A recipe names the logs and their layout, the goal map, the strategy mixture, the reward
rule, the split, the seed and the output. It is checked completely when loaded, so a build
never fails half-way on a typo.
"""

from __future__ import annotations

import glob
import os
from dataclasses import dataclass, replace
from pathlib import Path

from goalkit.config import check_keys, expect_type, parse_toml, read_text_file
from goalkit.archive import InlineLayout, SourceSpec, is_pattern
from goalkit.errors import ParameterError, RecipeError, shown
from goalkit.graphconfig import GraphSpec
from goalkit.heads import check_fixed_heads, heads_from_table
from goalkit.masks import MaskSpec
from goalkit.outputs import small_toml
from goalkit.pipeline.casts import FLOAT_DTYPES, INT_DTYPES
from goalkit.relabel import Mixture
from goalkit.relabel.mixture import MAX_GOALS_PER_TRANSITION
from goalkit.reward import RewardRule

RECIPE_VERSION = 1

TOP_KEYS = ("version", "seed", "logs", "sources", "goal", "relabel", "reward", "split", "output", "heads", "mask", "graph")
LOGS_KEYS = ("path", "layout", "skip_bad_episodes")
#: Keys of each ``[[sources]]`` table.
SOURCE_KEYS = ("name", "path", "layout", "skip_bad_episodes", "goals_per_transition")
#: Longest source name.
MAX_SOURCE_NAME = 64
GOAL_KEYS = ("fields", "indices", "embedding", "dtype")
SPLIT_KEYS = ("validation", "salt")
OUTPUT_KEYS = ("path", "mode", "compression", "chunk_rows", "observation_dtype", "action_dtype", "goals")
GOAL_DTYPES = FLOAT_DTYPES
#: Dtypes ``[output] action_dtype`` takes (integer ones only for logs whose actions are integers).
ACTION_DTYPES = FLOAT_DTYPES + INT_DTYPES
MODES = ("materialised", "indexed")
#: Values of ``[output] goals``: ``slots`` (goals_per_transition rows per transition, one goal
#: each) or ``heads`` (one row per transition, one column group per ``[heads.NAME]`` table).
GOAL_LAYOUTS = ("slots", "heads")
#: Compressions a build writes: with each, a recipe gives the same bytes whatever the producer,
#: worker count or chunk size.
COMPRESSIONS = ("gzip", "none")
#: Compressions of sets an earlier goalkit wrote, still read and verified but never written: HDF5's
#: LZF filter leaves its match table uninitialised, so its output is not a function of its input.
STORED_ONLY_COMPRESSIONS = ("lzf",)
#: Every key whose value is a path relative to the recipe's folder (a copy of the recipe
#: written to another folder rewrites exactly these; see goalkit.thresholds.recipe_edit).
PATH_KEYS = ("logs.path", "logs.layout", "goal.embedding", "relabel.library", "output.path")


@dataclass(frozen=True)
class GoalSpec:
    """How states become goals: exactly one of ``fields``, ``indices``, ``embedding``.

    Attributes
    ----------
    fields : tuple of str
        Named observation fields (from the layout's ``[fields]``).
    indices : tuple of int
        Observation columns.
    embedding : Path or None
        A saved embedding (.npz from ``goalkit embed``).
    dtype : str
        Storage dtype of goal vectors; rewards are computed from the stored values.
    """

    fields: tuple[str, ...] = ()
    indices: tuple[int, ...] = ()
    embedding: Path | None = None
    dtype: str = "float32"


@dataclass(frozen=True)
class OutputSpec:
    """Where and how the dataset is written."""

    path: Path
    mode: str = "materialised"
    compression: str = "gzip"
    chunk_rows: int = 65536
    #: Stored dtype of observation and next_observation (None: the logs' dtype).
    observation_dtype: str | None = None
    #: Stored dtype of action (None: the logs' dtype).
    action_dtype: str | None = None
    goals: str = "slots"


@dataclass(frozen=True)
class Recipe:
    """A checked recipe.

    Attributes
    ----------
    text : str
        The recipe's TOML text, stored verbatim in the dataset's provenance.
    file : str
        Where it was read from (for messages).
    seed : int
        The build's seed.
    logs_path, layout_path : Path
        Absolute paths of the logs and the layout file (None: auto-detected layout).
    skip_bad_episodes : bool
        Skip (and count) episodes that fail validation instead of refusing the logs.
    goal : GoalSpec
    mixture : goalkit.relabel.Mixture
    reward : goalkit.reward.RewardRule
    validation : float
        Fraction of episodes in the validation split.
    salt : int
        Salt of the split hash.
    output : OutputSpec
    heads : tuple of goalkit.heads.GoalHead
        The optional ``[heads.NAME]`` tables: goal heads of the multi-head training sampler
        (a build writes them as columns only with ``[output] goals = "heads"``).
    sources : tuple of SourceSpec, optional
        The logs as several files and/or sources (``[logs] path`` a list, a glob or a folder of
        log files, or ``[[sources]]``); None for one log file or per-file folder, read by
        ``logs_path`` and ``layout_path`` as before.
    named_sources : bool
        The sources are named (``[[sources]]``): rows carry a ``source`` column.
    masks : goalkit.masks.MaskSpec or None
        The ``[mask]`` table (goal masks); None: no mask column, every goal dimension counts.
    graph : goalkit.goals.stategraph.GraphSpec or None
        The ``[graph]`` table (graph distances, neighbour guard); None without one.
    source_goals : tuple of int or None
        Goal rows per transition of each source, in the recipe's ``[[sources]]`` order (a
        source's own ``goals_per_transition``, else ``[relabel] goals_per_transition``); None when
        no source gives its own (every transition gets the ``[relabel]`` number).
    """

    text: str
    file: str
    seed: int
    logs_path: Path
    layout_path: Path | None
    skip_bad_episodes: bool
    goal: GoalSpec
    mixture: object
    reward: object
    validation: float
    salt: int
    output: OutputSpec
    heads: tuple = ()
    sources: tuple | None = None
    named_sources: bool = False
    masks: MaskSpec | None = None
    graph: object = None
    source_goals: tuple | None = None

    def inputs(self) -> list[tuple[str, Path]]:
        """Every file or folder a build of this recipe reads, labelled for messages.

        The recipe file itself, the logs (a folder counts with its files), the layout, the goal
        embedding and the goal library, when given.
        """
        items = [("recipe", self.file if self.file and self.file != "<recipe>" else None),
                 ("[logs] path", self.logs_path), ("[logs] layout", self.layout_path),
                 ("[goal] embedding", self.goal.embedding),
                 ("[relabel] library", getattr(self.mixture, "library", None))]
        for spec in self.sources or ():
            where = f"[[sources]] '{spec.name}'" if spec.name else "[logs] path"
            for entry in spec.entries:
                matches = glob.glob(entry) if is_pattern(entry) else [entry]
                items += [(where, m) for m in sorted(matches)]
            if spec.layout_path:
                items.append((f"{where} layout", spec.layout_path))
        return [(label, Path(p)) for label, p in items if p is not None]

    def with_overrides(self, *, seed: int | None = None, out: str | Path | None = None) -> "Recipe":
        """Return a copy with the seed and/or output path replaced (CLI ``--seed`` / ``--out``)."""
        new = self
        if seed is not None:
            new = replace(new, seed=_check_seed(seed, new.file))
        if out is not None:
            # absolute but not resolved: a link given as the output is refused, never followed
            new = replace(new, output=replace(new.output, path=Path(os.path.abspath(Path(out).expanduser()))))
        return new


def _check_seed(seed, file) -> int:
    if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed < 2 ** 63:
        raise RecipeError(f"expected a whole number from 0 to 2**63 - 1, got {shown(seed)}", file=file, key="seed")
    return seed


def _table(doc, name, file, required=True) -> dict:
    if name not in doc:
        if required:
            raise RecipeError(f"missing table [{name}]", file=file, key=name)
        return {}
    value = doc[name]
    if not isinstance(value, dict):
        raise RecipeError(f"expected a table [{name}], got {value!r}", file=file, key=name)
    return value


def _path(value, base: Path, file, key, resolve: bool = True) -> Path:
    """An absolute path; with ``resolve``, links resolved too (inputs; outputs keep their links
    so that a link at an output path is refused rather than followed)."""
    expect_type(value, str, file=file, key=key, what="a path (string)", error=RecipeError)
    if not value:
        raise RecipeError("expected a path, got an empty string", file=file, key=key)
    p = Path(value).expanduser()
    p = p if p.is_absolute() else base / p
    try:
        return p.resolve() if resolve else Path(os.path.abspath(p))
    except (RuntimeError, OSError):          # a symbolic link loop (RuntimeError before Python 3.13)
        raise RecipeError(f"expected a path, got a symbolic link loop: {value}", file=file, key=key) from None


def _parse_goal(table, base, file) -> GoalSpec:
    check_keys(table, GOAL_KEYS, file=file, section="[goal]", error=RecipeError)
    given = [k for k in ("fields", "indices", "embedding") if k in table]
    if len(given) != 1:
        raise RecipeError(f"[goal] needs exactly one of fields, indices, embedding; got "
                          f"{', '.join(given) or 'none'}", file=file, key="goal")
    dtype = table.get("dtype", "float32")
    if dtype not in GOAL_DTYPES:
        raise RecipeError(f"expected one of {', '.join(GOAL_DTYPES)}, got {dtype!r}", file=file, key="goal.dtype")
    if "fields" in table:
        fields = table["fields"]
        if isinstance(fields, str):
            fields = [fields]
        if not (isinstance(fields, list) and fields and all(isinstance(f, str) for f in fields)):
            raise RecipeError(f"expected a non-empty list of field names, got {fields!r}", file=file, key="goal.fields")
        return GoalSpec(fields=tuple(fields), dtype=dtype)
    if "indices" in table:
        idx = table["indices"]
        if not (isinstance(idx, list) and idx and all(isinstance(i, int) and not isinstance(i, bool) and i >= 0
                                                       for i in idx)):
            raise RecipeError(f"expected a non-empty list of non-negative column numbers, got {shown(idx)}",
                              file=file, key="goal.indices")
        if len(set(idx)) != len(idx):
            raise RecipeError(f"expected distinct column numbers, got {shown(idx)}", file=file, key="goal.indices")
        return GoalSpec(indices=tuple(idx), dtype=dtype)
    return GoalSpec(embedding=_path(table["embedding"], base, file, "goal.embedding"), dtype=dtype)


def _parse_split(table, file) -> tuple[float, int]:
    check_keys(table, SPLIT_KEYS, file=file, section="[split]", error=RecipeError)
    frac = table.get("validation", 0.1)
    if isinstance(frac, bool) or not isinstance(frac, (int, float)) or not 0.0 <= frac < 1.0:
        raise RecipeError(f"expected a fraction in [0, 1), got {shown(frac)}", file=file, key="split.validation")
    salt = table.get("salt", 0)
    if isinstance(salt, bool) or not isinstance(salt, int) or not 0 <= salt < 2 ** 63:
        raise RecipeError(f"expected a whole number >= 0, got {shown(salt)}", file=file, key="split.salt")
    return float(frac), salt


def _parse_output(table, base, file, stored: bool = False) -> OutputSpec:
    check_keys(table, OUTPUT_KEYS, file=file, section="[output]", error=RecipeError)
    if "path" not in table:
        raise RecipeError("missing key 'path' in [output]", file=file, key="output.path")
    mode = table.get("mode", "materialised")
    if mode not in MODES:
        raise RecipeError(f"expected one of {', '.join(MODES)}, got {mode!r}", file=file, key="output.mode")
    comp = table.get("compression", "gzip")
    if comp in STORED_ONLY_COMPRESSIONS and not stored:
        raise RecipeError(f"{comp} is not written any more: HDF5's LZF filter leaves its match table "
                          "uninitialised, so two builds of one recipe can differ in a few bytes; use "
                          "compression = \"gzip\" (about as fast, smaller files) or \"none\"", file=file,
                          key="output.compression")
    if comp not in COMPRESSIONS + (STORED_ONLY_COMPRESSIONS if stored else ()):
        raise RecipeError(f"expected one of {', '.join(COMPRESSIONS)}, got {comp!r}", file=file,
                          key="output.compression")
    rows = table.get("chunk_rows", 65536)
    if isinstance(rows, bool) or not isinstance(rows, int) or not 256 <= rows <= 2 ** 24:
        raise RecipeError(f"expected a whole number from 256 to 16777216, got {shown(rows)}", file=file,
                          key="output.chunk_rows")
    dtypes = {}
    for key, allowed in (("observation_dtype", FLOAT_DTYPES), ("action_dtype", ACTION_DTYPES)):
        if key in table:
            value = table[key]
            if value not in allowed:
                raise RecipeError(f"expected one of {', '.join(allowed)}, got {shown(value)}", file=file,
                                  key=f"output.{key}")
            if mode != "materialised":
                raise RecipeError(f"an {mode} set stores no observations or actions (its reader takes them from "
                                  f"the logs); expected {key} only with mode = \"materialised\"", file=file,
                                  key=f"output.{key}")
            dtypes[key] = value
    goals = table.get("goals", "slots")
    if goals not in GOAL_LAYOUTS:
        raise RecipeError(f"expected one of {', '.join(GOAL_LAYOUTS)}, got {shown(goals)}", file=file,
                          key="output.goals")
    return OutputSpec(path=_path(table["path"], base, file, "output.path", resolve=False), mode=mode,
                      compression=comp,
                      chunk_rows=rows, goals=goals, **dtypes)


def parse_recipe(text: str, file="<recipe>", base: Path | None = None, *, stored: bool = False) -> Recipe:
    """Parse and check recipe ``text``.

    Parameters
    ----------
    text : str
        TOML text.
    file : str
        Name used in messages.
    base : Path, optional
        Directory that relative paths are relative to (default: the current directory).
    stored : bool
        The recipe stored in a set (to read or verify it): also accept what an earlier goalkit
        wrote and this one no longer writes (:data:`STORED_ONLY_COMPRESSIONS`).

    Returns
    -------
    Recipe

    Raises
    ------
    RecipeError
        On any unknown key, missing table or impossible value, naming the key.
    """
    base = (base or Path.cwd()).resolve()
    doc = parse_toml(text, file, RecipeError)
    check_keys(doc, TOP_KEYS, file=file, section="the recipe's top level", error=RecipeError)
    version = doc.get("version", RECIPE_VERSION)
    if version != RECIPE_VERSION:
        raise RecipeError(f"expected version = {RECIPE_VERSION}, got {shown(version)}", file=file, key="version")
    seed = _check_seed(doc.get("seed", 0), file)
    logs_path = layout_path = None
    skip, sources, named, own_goals = False, None, False, None
    if "sources" in doc:
        if "logs" in doc:
            raise RecipeError("expected either [logs] or [[sources]], not both", file=file, key="sources")
        sources, named = _parse_sources(doc["sources"], base, file), True
        own_goals = _source_goals(doc["sources"], file)
    else:
        logs = _table(doc, "logs", file)
        check_keys(logs, LOGS_KEYS, file=file, section="[logs]", error=RecipeError)
        if "path" not in logs:
            raise RecipeError("missing key 'path' in [logs]", file=file, key="logs.path")
        inline = logs.get("layout") if isinstance(logs.get("layout"), dict) else None
        layout_path = (_path(logs["layout"], base, file, "logs.layout") if "layout" in logs and inline is None
                       else None)
        skip = logs.get("skip_bad_episodes", False)
        expect_type(skip, bool, file=file, key="logs.skip_bad_episodes", what="true or false", error=RecipeError)
        value = logs["path"]
        if inline is not None:   # a layout written in the recipe: read as a source (goalkit.logs.multi)
            sources = (SourceSpec("", _entries(value, base, file, "logs.path"), _inline_layout(inline, file, "logs"),
                                  skip, "logs.path", ""),)
        elif isinstance(value, str) and not is_pattern(value):
            logs_path = _path(value, base, file, "logs.path")
            if logs_path.is_dir() and _holds_logs(logs_path, layout_path):
                sources = (SourceSpec("", (str(logs_path),), None, skip, "logs.path", str(layout_path or "")),)
        else:
            entries = _entries(value, base, file, "logs.path")
            sources = (SourceSpec("", entries, None, skip, "logs.path", str(layout_path or "")),)
        if sources is not None:
            logs_path = None
    goal = _parse_goal(_table(doc, "goal", file), base, file)
    # tables whose every key has a documented default may be left out (docs/recipe.md)
    mixture = _in_recipe(Mixture.from_table, _table(doc, "relabel", file, required=False), file, "relabel")
    if mixture.library is not None:  # relative to the recipe's folder, like every other path
        lib = _path(mixture.library, base, file, "relabel.library")
        if not lib.is_file():
            raise RecipeError(f"no such goal library file: {lib}", file=file, key="relabel.library")
        mixture = replace(mixture, library=str(lib))
    reward = _in_recipe(RewardRule.from_table, _table(doc, "reward", file), file, "reward")
    validation, salt = _parse_split(_table(doc, "split", file, required=False), file)
    output = _parse_output(_table(doc, "output", file), base, file, stored=stored)
    graph = None
    if "graph" in doc:  # graph distances; absent: the set is what it was without them
        graph = _in_recipe(GraphSpec.from_table, _table(doc, "graph", file), file, "graph")
    masks = _in_recipe(MaskSpec.from_table, doc["mask"], file, "mask") if "mask" in doc else None
    heads = heads_from_table(_table(doc, "heads", file, required=False), file)
    source_goals = None
    if own_goals is not None and any(k is not None for k in own_goals):
        source_goals = tuple(mixture.goals_per_transition if k is None else k for k in own_goals)
        if max(source_goals) == 0:
            raise RecipeError("every source gets 0 goal rows per transition, so the set would be empty; expected "
                              "at least one source with goals_per_transition >= 1", file=file,
                              key="sources[0].goals_per_transition")
    if output.goals == "heads":  # one row per transition, the heads' goals in columns
        check_fixed_heads(heads, file)
        given = _table(doc, "relabel", file).get("goals_per_transition", 1)
        if given != 1:
            raise RecipeError(f"expected goals_per_transition = 1 (or none) with [output] goals = \"heads\" (one "
                              f"row per transition), got {shown(given)}", file=file,
                              key="relabel.goals_per_transition")
        mixture = replace(mixture, goals_per_transition=1)
    if output.goals == "heads" and source_goals is not None:
        raise RecipeError("per-source goals_per_transition needs one goal row per slot; expected it only with "
                          "[output] goals = \"slots\" (a build with goal heads writes one row per transition)",
                          file=file, key="output.goals")
    return Recipe(text=text, file=str(file), seed=seed, logs_path=logs_path, layout_path=layout_path,
                  skip_bad_episodes=skip, goal=goal, mixture=mixture, reward=reward,
                  validation=validation, salt=salt, output=output, heads=heads,
                  sources=sources, named_sources=named, masks=masks, graph=graph, source_goals=source_goals)


def _in_recipe(make, table, file, name: str):
    """``make(table)``, its :class:`ParameterError` re-raised naming the recipe file and key ``[name]``."""
    try:
        return make(table)
    except ParameterError as exc:
        raise exc.in_recipe(file, name) from None


def _holds_logs(folder: Path, layout_path) -> bool:
    """A folder given as ``[logs] path`` stands for its HDF5/NPZ log files (several logs) unless it
    is a per-file folder: its layout says ``shape = "per-file"`` (or bag, table), or, without a
    layout, it holds no ``.h5``/``.hdf5``/``.hdf`` file (a per-file folder holds ``.npz`` files).
    A folder with no log file at all is left to the reader, which names the problem."""
    try:
        names = [n.lower() for n in os.listdir(folder)]
    except OSError:
        return False
    if layout_path is not None:
        doc = small_toml(layout_path)
        if doc is not None and doc.get("shape") in ("per-file", "bag", "table"):
            return False
        return any(n.endswith((".h5", ".hdf5", ".hdf", ".npz")) for n in names)
    return any(n.endswith((".h5", ".hdf5", ".hdf")) for n in names)


def _entries(value, base: Path, file, key) -> tuple:
    """A path, a glob or a list of them, as absolute paths (globs kept as patterns)."""
    items = [value] if isinstance(value, str) else value
    if not isinstance(items, list) or not items:
        raise RecipeError(f"expected a path, a glob or a non-empty list of them, got {value!r}", file=file, key=key)
    out = []
    for i, item in enumerate(items):
        where = key if isinstance(value, str) else f"{key}[{i}]"
        if not isinstance(item, str) or not item:
            raise RecipeError(f"expected a path or a glob (a non-empty string), got {item!r}", file=file, key=where)
        p = Path(item).expanduser()
        p = p if p.is_absolute() else base / p
        out.append(os.path.abspath(p) if is_pattern(item) else str(_path(str(p), base, file, where)))
    return tuple(out)


def _inline_layout(table: dict, file, where: str) -> InlineLayout:
    """A layout written in the recipe as a table (``[logs.layout]``); parsed when the logs are opened."""
    if "shape" not in table:
        raise RecipeError("expected a layout file name or a layout table with at least 'shape' (docs/layout.md)",
                          file=file, key=f"{where}.layout")
    return InlineLayout(table=table, file=str(file), key=f"{where}.layout")


def _parse_sources(value, base: Path, file) -> tuple:
    """``[[sources]]``: named sources, each with its own files and layout."""
    if not isinstance(value, list) or not value or not all(isinstance(t, dict) for t in value):
        raise RecipeError("expected one or more [[sources]] tables", file=file, key="sources")
    specs, names = [], {}
    for i, table in enumerate(value):
        where = f"sources[{i}]"
        check_keys(table, SOURCE_KEYS, file=file, section=f"[[sources]] number {i + 1}", error=RecipeError)
        for required in ("name", "path"):
            if required not in table:
                raise RecipeError(f"missing key '{required}' in [[sources]] number {i + 1}", file=file,
                                  key=f"{where}.{required}")
        name = table["name"]
        if (not isinstance(name, str) or not name or len(name) > MAX_SOURCE_NAME
                or not name.isprintable() or name.strip() != name):
            raise RecipeError(f"expected a source name of 1 to {MAX_SOURCE_NAME} printable characters without "
                              f"leading or trailing spaces, got {name!r}", file=file, key=f"{where}.name")
        if name in names:
            raise RecipeError(f"two sources are named '{name}' (sources[{names[name]}] and {where}); expected "
                              f"distinct names", file=file, key=f"{where}.name")
        names[name] = i
        skip = table.get("skip_bad_episodes", False)
        expect_type(skip, bool, file=file, key=f"{where}.skip_bad_episodes", what="true or false",
                    error=RecipeError)
        inline = _inline_layout(table["layout"], file, where) if isinstance(table.get("layout"), dict) else None
        layout = (_path(table["layout"], base, file, f"{where}.layout") if "layout" in table and inline is None
                  else None)
        specs.append(SourceSpec(name, _entries(table["path"], base, file, f"{where}.path"), inline, skip,
                                f"{where}.path", str(layout or "")))
    return tuple(specs)


def _source_goals(tables, file) -> tuple:
    """Each ``[[sources]]`` table's own ``goals_per_transition`` (None where it gives none).

    A whole number from 0 (the source's states serve as goals of other sources' rows, its own
    transitions get no rows) to :data:`goalkit.relabel.mixture.MAX_GOALS_PER_TRANSITION`.
    """
    out = []
    for i, table in enumerate(tables):
        k = table.get("goals_per_transition")
        if k is not None and (isinstance(k, bool) or not isinstance(k, int) or not 0 <= k <= MAX_GOALS_PER_TRANSITION):
            raise RecipeError(f"expected a whole number from 0 to {MAX_GOALS_PER_TRANSITION} (goal rows per "
                              f"transition of this source), got {shown(k)}", file=file,
                              key=f"sources[{i}].goals_per_transition")
        out.append(k)
    return tuple(out)


def load_recipe(path) -> Recipe:
    """Read and check the recipe file at ``path``; relative paths in it are relative to its folder."""
    path = Path(path)
    doc_text = _read_text(path)
    return parse_recipe(doc_text, file=str(path), base=path.resolve().parent)


def _read_text(path: Path) -> str:
    return read_text_file(path, RecipeError)  # not-found, folder, device, size, UTF-8: one line


def is_recipe_file(path) -> bool:
    """True when ``path`` is a small TOML file with a recipe's keys only, [logs] and [output] among them.

    The test that lets ``--replace`` replace an existing recipe (``tune --write-recipe``,
    ``demo``); anything else at the path is never replaced.
    """
    doc = small_toml(path)
    return (doc is not None and isinstance(doc.get("logs"), dict) and isinstance(doc.get("output"), dict)
            and set(doc) <= set(TOP_KEYS))
