"""Write a copy of a recipe with a new goal-match threshold (and distance), keeping its comments.

The recipe is edited with tomlkit, a TOML library that keeps a document's comments, order and
spacing: only the value of ``[reward] threshold`` (and of ``distance``, when another distance
won) changes, and a comment line saying what ``goalkit tune`` did goes above the threshold.
When the copy goes to another folder, every relative path of the recipe
(:data:`goalkit.pipeline.recipe.PATH_KEYS`: logs, layout, goal embedding, goal library, output)
is rewritten so that it still names the same file. Switching to ``box`` removes ``weights``
(box takes none; the old line is kept as a comment).

The edit is checked: the new text must parse, with the standard-library TOML reader, to exactly
the old document with those values changed. The file is written through
:func:`goalkit.outputs.write_text`, so no half-written recipe is ever left.
"""

from __future__ import annotations

import copy
import math
import os
from dataclasses import dataclass
from pathlib import Path

import tomlkit

from goalkit.config import parse_toml
from goalkit.errors import GoalkitError, RecipeError, shown
from goalkit.outputs import check_no_overlap, write_text
from goalkit.pipeline.recipe import PATH_KEYS, is_recipe_file, parse_recipe


@dataclass(frozen=True)
class RecipeEdit:
    """The outcome of :func:`tuned_recipe_text`.

    Attributes
    ----------
    text : str
        The new recipe text.
    kept_comments : bool
        True when the comments were kept (always, unless the edited text failed its check and
        the recipe was written afresh from its parsed document).
    changes : tuple of str
        What changed, in words.
    """

    text: str
    kept_comments: bool
    changes: tuple[str, ...]


def toml_value(value) -> str:
    """TOML text of a string, bool, number, or list of those (for messages and notes)."""
    if isinstance(value, float) and not math.isfinite(value):
        raise RecipeError(f"cannot write the non-finite number {shown(value)} into a recipe")
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    return tomlkit.item(value).as_string()


def _rebased(value: str, old_dir: Path, new_dir: Path) -> str | None:
    """``value`` (relative to ``old_dir``) made relative to ``new_dir``; None when unchanged."""
    p = Path(value).expanduser()
    if p.is_absolute() or old_dir.resolve() == new_dir.resolve():
        return None
    target = (old_dir / p).resolve()
    return Path(os.path.relpath(target, new_dir.resolve())).as_posix()


def _rebased_value(value, old_dir: Path, new_dir: Path):
    """A path or a list of paths and globs (``[logs] path``, ``[[sources]] path``) rebased; None
    when unchanged or not paths."""
    if isinstance(value, str):
        new = _rebased(value, old_dir, new_dir)
        return new if new is not None and new != value else None
    if isinstance(value, list) and value and all(isinstance(v, str) for v in value):
        new = [_rebased(v, old_dir, new_dir) or v for v in value]
        return new if new != value else None
    return None


def _get(doc, path: str):
    cur = doc
    for part in path.split("."):
        if not hasattr(cur, "get") or part not in cur:
            return None
        cur = cur[part]
    return cur


def _table(doc, path: str):
    cur = doc
    for part in path.split(".")[:-1]:
        cur = cur[part]
    return cur


def tuned_recipe_text(text: str, *, threshold, distance: str | None = None, note: str = "",
                      source_dir=None, target_dir=None, file="<recipe>") -> RecipeEdit:
    """Return the recipe ``text`` with a new ``[reward] threshold`` (and ``distance``).

    Parameters
    ----------
    text : str
        The recipe's TOML text.
    threshold : float or sequence of float
        The new threshold (a list of tolerances for ``box``).
    distance : str, optional
        A new distance name; None keeps the recipe's.
    note : str
        Text of the comment line put above the threshold.
    source_dir, target_dir : Path, optional
        The recipe's folder and the copy's; relative paths are rewritten when they differ.
    file : str
        The recipe's name, for messages.

    Returns
    -------
    RecipeEdit

    Raises
    ------
    RecipeError
        When the text is not TOML, has no ``[reward]`` table, or a value cannot be written.

    Examples
    --------
    >>> t = '[reward]\\nthreshold = 0.05   # metres\\n'
    >>> print(tuned_recipe_text(t, threshold=0.02, note="tuned").text, end="")
    [reward]
    # tuned
    threshold = 0.02   # metres
    """
    doc = parse_toml(text, file, RecipeError)
    reward = doc.get("reward")
    if not isinstance(reward, dict):
        raise RecipeError("missing table [reward]", file=file, key="reward")
    thr = [float(x) for x in threshold] if isinstance(threshold, (list, tuple)) else float(threshold)
    toml_value(thr)  # refuses a non-finite threshold
    edited = tomlkit.parse(text)
    expected = copy.deepcopy(doc)
    words = [f"threshold {toml_value(reward.get('threshold'))} -> {toml_value(thr)}"]
    comments = [note] if note else []
    old_distance = reward.get("distance", "euclidean")
    if distance is not None and distance != old_distance:
        edited["reward"]["distance"] = expected["reward"]["distance"] = distance
        words.append(f"distance {old_distance} -> {distance}")
        if distance == "box" and "weights" in reward:
            del edited["reward"]["weights"]
            del expected["reward"]["weights"]
            comments.append(f"removed by goalkit tune: weights = {toml_value(reward['weights'])}")
            words.append("weights removed (box takes none)")
    edited["reward"]["threshold"] = expected["reward"]["threshold"] = thr
    if source_dir is not None and target_dir is not None:
        for key in PATH_KEYS:
            new = _rebased_value(_get(doc, key), Path(source_dir), Path(target_dir))
            if new is not None:
                _table(edited, key)[key.rsplit(".", 1)[1]] = new
                _table(expected, key)[key.rsplit(".", 1)[1]] = new
                words.append(f"{key} rewritten relative to the new folder")
        sources = doc.get("sources")
        for i, table in enumerate(sources if isinstance(sources, list) else []):
            for name in ("path", "layout"):
                new = _rebased_value(table.get(name) if isinstance(table, dict) else None, Path(source_dir),
                                     Path(target_dir))
                if new is not None:
                    edited["sources"][i][name] = expected["sources"][i][name] = new
                    words.append(f"sources[{i}].{name} rewritten relative to the new folder")
    new_text = _with_comments(edited, comments)
    if parse_toml(new_text, file, RecipeError) == expected:
        return RecipeEdit(new_text, True, tuple(words))
    fresh = "".join(f"# {c}\n" for c in comments) + tomlkit.dumps(expected)  # pragma: no cover
    if parse_toml(fresh, file, RecipeError) != expected:  # pragma: no cover - tomlkit bug
        raise GoalkitError("cannot write the tuned recipe: the rewritten text does not read back "
                           "as the same recipe", file=file)
    return RecipeEdit(fresh, False, tuple(words))  # pragma: no cover


def _with_comments(edited, comments: list[str]) -> str:
    """The edited document's text with ``comments`` as lines above the threshold (or on top)."""
    lines = "".join(f"# {c}\n" for c in comments)
    if not lines:
        return tomlkit.dumps(edited)
    reward = edited["reward"]
    item = reward.item("threshold") if isinstance(reward, tomlkit.items.Table) else None
    if item is None or isinstance(reward, tomlkit.items.InlineTable):
        return lines + tomlkit.dumps(edited)  # dotted keys or an inline table: comments go on top
    indent = item.trivia.indent.rsplit("\n", 1)[-1]
    item.trivia.indent = item.trivia.indent + "".join(indent + line for line in lines.splitlines(True)) + indent
    return tomlkit.dumps(edited)


def write_tuned_recipe(recipe, out, *, threshold, distance: str | None = None, note: str = "",
                       replace: bool = False) -> RecipeEdit:
    """Write a copy of ``recipe`` (a loaded Recipe) to ``out`` with the new threshold.

    Parameters
    ----------
    recipe : Recipe
        The loaded recipe (its text and file are used).
    out : str or Path
        The copy's file name; relative paths in it are rewritten for its folder.
    threshold, distance, note
        As in :func:`tuned_recipe_text`.
    replace : bool
        Replace an existing recipe file at ``out`` (never anything else).

    Returns
    -------
    RecipeEdit

    Raises
    ------
    GoalkitError
        When ``out`` is a folder, its folder does not exist, it is one of the recipe's inputs,
        or the file cannot be written. The copy is read back with
        :func:`goalkit.pipeline.recipe.parse_recipe` first, so a copy that would not load is
        never written.
    """
    out = Path(out)
    if out.is_dir():
        raise GoalkitError("expected a file name for the tuned recipe, got a folder", file=out)
    check_no_overlap(recipe.inputs(), [("--write-recipe", out)])
    if not out.parent.resolve().is_dir():
        raise GoalkitError("the folder of the tuned recipe does not exist", file=out)
    src_dir = Path(recipe.file).resolve().parent
    edit = tuned_recipe_text(recipe.text, threshold=threshold, distance=distance, note=note,
                             source_dir=src_dir, target_dir=out.parent, file=recipe.file)
    parse_recipe(edit.text, file=str(out), base=out.parent.resolve())
    write_text(out, edit.text, replace=replace, ours=is_recipe_file, what="tuned recipe")
    return edit
