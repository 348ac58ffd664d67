"""Fetch the source steps behind an indexed set's rows from the original logs (wherever they are now)."""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from goalkit.config import parse_toml
from goalkit.errors import DatasetError, GoalkitError
from goalkit.logs import open_logs
from goalkit.logs.layout import parse_layout
from goalkit.pipeline.goal import make_goal_map
from goalkit.pipeline.recipe import parse_recipe
from goalkit.logs.multi import open_sources, specs_from_provenance
from goalkit.write.relocate import Relocation, locate


@dataclass
class LogsOfSet:
    """The logs a set was built from, reopened as they were at build time."""

    source: object
    goal_map: object
    goal_dtype: np.dtype
    recipe: object

    def positions(self, episode_ids) -> np.ndarray:
        return np.searchsorted(np.asarray(self.source.episode_ids), np.asarray(episode_ids, dtype=np.int64))


def recipe_of(goalset, relocation: Relocation | None = None):
    """Parse the recipe stored in a set, with paths as they were resolved at build time.

    With ``relocation`` (:func:`goalkit.write.relocate.locate`), the paths of the logs, the
    layout, the embedding and the goal library are where those files are now.
    """
    prov = goalset.provenance
    several = "sources" in prov
    for key, required in (("recipe_file", False), ("layout_path", False), ("logs_path", not several)):
        value = prov.get(key)
        if (required and not value) or not isinstance(value, (str, type(None))):
            raise DatasetError("expected the path as text", file=goalset.path, key=f"provenance.{key}")
    base = Path(prov["recipe_file"]).parent if prov.get("recipe_file") else Path.cwd()
    try:
        recipe = parse_recipe(goalset.recipe, file=f"{goalset.path}:recipe", base=base, stored=True)
    except GoalkitError as exc:
        raise DatasetError(f"the stored recipe cannot be used: {exc}", file=goalset.path, key="recipe") from None
    layout = Path(prov["layout_path"]) if prov.get("layout_path") else None
    if several:   # the files and layouts as read at build time
        specs = specs_from_provenance(prov["sources"], DatasetError, file=goalset.path)
        recipe = replace(recipe, logs_path=None, layout_path=layout, sources=specs)
    else:
        recipe = replace(recipe, logs_path=Path(prov["logs_path"]), layout_path=layout)
    return recipe if relocation is None else relocated(recipe, relocation, goalset.path)


def relocated(recipe, relocation: Relocation, file=None):
    """``recipe`` with every file and folder it reads where :func:`locate` found it."""
    where = relocation.path
    library = getattr(recipe.mixture, "library", None)
    recipe = replace(recipe, logs_path=where(recipe.logs_path, file), layout_path=where(recipe.layout_path, file),
                     goal=replace(recipe.goal, embedding=where(recipe.goal.embedding, file)))
    if library is not None:
        recipe = replace(recipe, mixture=replace(recipe.mixture, library=str(where(library, file))))
    if recipe.sources is not None:
        recipe = replace(recipe, sources=tuple(replace(s, entries=tuple(str(where(e, file)) for e in s.entries))
                                               for s in recipe.sources))
    return recipe


def locate_logs(goalset, logs_root=None) -> Relocation:
    """Where the files a set was built from are now (the reader's search: refuses what matches nowhere)."""
    return locate(goalset.path, goalset.provenance, logs_root, strict=True, cache=True)


def open_logs_of(goalset, logs_root=None, relocation: Relocation | None = None) -> LogsOfSet:
    """Reopen the logs (with the layout text stored in the set) and the goal map.

    The files are looked for as :func:`goalkit.write.relocate.locate` says (beside the set,
    at their recorded paths, then under ``logs_root``), unless ``relocation`` is given.
    """
    if relocation is None:
        relocation = locate_logs(goalset, logs_root)
    recipe = recipe_of(goalset, relocation)
    prov = goalset.provenance
    layout = None
    if not isinstance(prov.get("layout_text", ""), str):
        raise DatasetError("expected TOML text", file=goalset.path, key="provenance.layout_text")
    if prov.get("layout_text"):
        layout = parse_layout(parse_toml(prov["layout_text"], f"{goalset.path}:layout", DatasetError),
                              f"{goalset.path}:layout")
    try:
        if recipe.sources is not None:
            source = open_sources(recipe.sources, named=recipe.named_sources, file=goalset.path)
        else:
            source = open_logs(recipe.logs_path, layout, skip_bad_episodes=recipe.skip_bad_episodes)
    except GoalkitError as exc:
        raise DatasetError(f"cannot reopen the logs this set was built from: {exc}", file=goalset.path) from None
    first = source.read(0, 1)
    goal_map = make_goal_map(recipe.goal, source, first.observations.shape[1], file=recipe.file)
    return LogsOfSet(source=source, goal_map=goal_map, goal_dtype=np.dtype(recipe.goal.dtype), recipe=recipe)


def resolve_rows(logs: LogsOfSet, episode_ids, steps, names) -> dict:
    """Return the requested materialised columns for rows (episode id, step).

    Rows are expected to be sorted by episode (as in every built set), so one contiguous read
    of the episodes they span is enough.
    """
    out = {}
    if len(episode_ids) == 0:
        return {n: np.zeros((0,)) for n in names}
    pos = logs.positions(episode_ids)
    a, b = int(pos.min()), int(pos.max()) + 1
    chunk = logs.source.read(a, b)
    local = pos - a
    cur = chunk.state_row(local, steps)
    trans = chunk.offsets[local] + np.asarray(steps, dtype=np.int64)
    if "observation" in names:
        out["observation"] = chunk.observations[cur]
    if "next_observation" in names:
        out["next_observation"] = chunk.observations[cur + 1]
    if "action" in names:
        out["action"] = chunk.actions[trans]
    if "reached_goal" in names:
        out["reached_goal"] = logs.goal_map(chunk, cur + 1).astype(logs.goal_dtype)
    return out
