"""Write a copy of a recipe with a new goal-match threshold (and distance), keeping its comments.

The recipe's TOML text is edited in place: only the value of ``[reward] threshold`` (and of
``distance``, when another distance won) changes, a comment line saying what ``goalkit tune``
did goes above it, and every other byte -- comments, order, spacing -- stays. When the copy
goes to another folder, relative paths (``[logs] path`` / ``layout``, ``[goal] embedding``,
``[output] path``) are rewritten so that they still name the same files. Switching to
``box`` removes ``weights`` (box takes none; the line is kept as a comment).

The edit is checked: the new text must parse to exactly the old document with those values
changed. When the text cannot be edited safely that way (say, ``[reward]`` written as an
inline table), the recipe is written out afresh from its parsed document instead -- correct,
but without the comments; :class:`RecipeEdit` says which happened. The file is written to a
temporary name in the target folder and renamed, so no half-written recipe is ever left.
"""

from __future__ import annotations

import copy
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path

from goalkit.config import parse_toml
from goalkit.errors import GoalkitError, RecipeError
from goalkit.outputs import write_text

#: Keys holding paths that are relative to the recipe's folder.
PATH_KEYS = ("logs.path", "logs.layout", "goal.embedding", "output.path")

_HEADER = re.compile(r"^\s*\[\s*([^\[\]#]+?)\s*\]\s*(#.*)?$")
_KEY = re.compile(r"^\s*((?:[A-Za-z0-9_\-]+|\"[^\"]*\"|'[^']*')(?:\s*\.\s*(?:[A-Za-z0-9_\-]+|\"[^\"]*\"|'[^']*'))*)\s*=")


@dataclass(frozen=True)
class RecipeEdit:
    """The outcome of :func:`tuned_recipe_text`.

    Attributes
    ----------
    text : str
        The new recipe text.
    kept_comments : bool
        True when the text was edited in place (comments kept); False when it was written
        afresh from the parsed document.
    changes : tuple of str
        What changed, in words.
    """

    text: str
    kept_comments: bool
    changes: tuple[str, ...]


# ---- formatting TOML values ------------------------------------------------------------
def toml_value(value) -> str:
    """TOML text of a string, bool, number, or list of those."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise RecipeError(f"cannot write the non-finite number {value!r} into a recipe")
        return repr(value)
    if isinstance(value, str):
        out = value.replace("\\", "\\\\").replace('"', '\\"')
        out = out.replace("\n", "\\n").replace("\t", "\\t").replace("\r", "\\r")
        return f'"{out}"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    raise RecipeError(f"cannot write a value of type {type(value).__name__} into a recipe")


def _key_text(k: str) -> str:
    return k if re.fullmatch(r"[A-Za-z0-9_\-]+", k) else toml_value(k)


def dump_toml(doc: dict) -> str:
    """Write a parsed recipe document as TOML (tables as ``[a]`` / ``[a.b]`` sections)."""
    lines: list[str] = []

    def section(table: dict, name: str) -> None:
        scalars = {k: v for k, v in table.items() if not isinstance(v, dict)}
        subs = {k: v for k, v in table.items() if isinstance(v, dict)}
        if name and (scalars or not subs):
            if lines:
                lines.append("")
            lines.append(f"[{name}]")
        for k, v in scalars.items():
            lines.append(f"{_key_text(k)} = {toml_value(v)}")
        for k, v in subs.items():
            section(v, f"{name}.{_key_text(k)}" if name else _key_text(k))

    section(doc, "")
    return "\n".join(lines) + "\n"


# ---- locating values in the text --------------------------------------------------------
def _norm_key(raw: str) -> list[str]:
    parts = re.findall(r"\"[^\"]*\"|'[^']*'|[A-Za-z0-9_\-]+", raw)
    return [p[1:-1] if p[0] in "\"'" else p for p in parts]


def _value_end(text: str, i: int) -> int:
    """End offset of the TOML value starting at or after ``i`` (before a trailing comment)."""
    n = len(text)
    depth = 0
    last = i
    while i < n:
        c = text[i]
        if text.startswith('"""', i) or text.startswith("'''", i):
            q = text[i:i + 3]
            j = text.find(q, i + 3)
            if j < 0:
                return n
            i = j + 3
            while i < n and text[i] == q[0]:
                i += 1
            last = i
            continue
        if c in "\"'":
            j = i + 1
            while j < n and text[j] != c and text[j] != "\n":
                j += 2 if (c == '"' and text[j] == "\\") else 1
            i = j + 1
            last = i
            continue
        if c == "#":
            j = text.find("\n", i)
            if depth == 0:
                return last
            i = n if j < 0 else j
            continue
        if c == "\n":
            if depth == 0:
                return last
            i += 1
            continue
        if c in "[{":
            depth += 1
        elif c in "]}":
            depth -= 1
        if not c.isspace():
            last = i + 1
        i += 1
    return last


@dataclass
class _Slot:
    line_start: int
    value_start: int
    value_end: int
    indent: str


def _locate(text: str) -> tuple[dict[str, _Slot], dict[str, int]]:
    """Key path -> where its value is; table name -> offset after its last statement."""
    slots: dict[str, _Slot] = {}
    table_end: dict[str, int] = {}
    table = ""
    i, n = 0, len(text)
    while i < n:
        j = text.find("\n", i)
        line_end = n if j < 0 else j
        line = text[i:line_end]
        stripped = line.strip()
        nxt = line_end + 1
        if not stripped or stripped.startswith("#"):
            pass
        elif stripped.startswith("[["):
            table = "\0array"
        elif stripped.startswith("["):
            m = _HEADER.match(line)
            table = ".".join(_norm_key(m.group(1))) if m else "\0unknown"
            table_end[table] = nxt
        else:
            m = _KEY.match(line)
            if m is None:
                raise ValueError("unrecognised line")
            vstart = i + m.end()
            while vstart < n and text[vstart] in " \t":
                vstart += 1
            vend = _value_end(text, vstart)
            path = ".".join(([table] if table else []) + _norm_key(m.group(1)))
            indent = line[:len(line) - len(line.lstrip())]
            slots[path] = _Slot(i, vstart, vend, indent)
            k = text.find("\n", vend)
            nxt = n if k < 0 else k + 1
            table_end[table] = nxt
        i = nxt
    return slots, table_end


# ---- the edit ----------------------------------------------------------------------------
def _rebased(value: str, old_dir: Path, new_dir: Path) -> str | None:
    """``value`` (relative to ``old_dir``) made relative to ``new_dir``; None when unchanged."""
    p = Path(value).expanduser()
    if p.is_absolute() or old_dir.resolve() == new_dir.resolve():
        return None
    target = (old_dir / p).resolve()
    return Path(os.path.relpath(target, new_dir.resolve())).as_posix()


def _get(doc: dict, path: str):
    cur = doc
    for part in path.split("."):
        if not isinstance(cur, dict) or part not in cur:
            return None
        cur = cur[part]
    return cur


def _set(doc: dict, path: str, value) -> None:
    parts = path.split(".")
    cur = doc
    for part in parts[:-1]:
        cur = cur.setdefault(part, {})
    if value is _DELETE:
        cur.pop(parts[-1], None)
    else:
        cur[parts[-1]] = value


_DELETE = object()


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
    changes = {"reward.threshold": thr}
    words = [f"threshold {toml_value(reward.get('threshold'))} -> {toml_value(thr)}"]
    old_distance = reward.get("distance", "euclidean")
    if distance is not None and distance != old_distance:
        changes["reward.distance"] = distance
        words.append(f"distance {old_distance} -> {distance}")
        if distance == "box" and "weights" in reward:
            changes["reward.weights"] = _DELETE
            words.append("weights removed (box takes none)")
    if source_dir is not None and target_dir is not None:
        for key in PATH_KEYS:
            value = _get(doc, key)
            if isinstance(value, str):
                new = _rebased(value, Path(source_dir), Path(target_dir))
                if new is not None and new != value:
                    changes[key] = new
                    words.append(f"{key} rewritten relative to the new folder")
    expected = copy.deepcopy(doc)
    for key, value in changes.items():
        _set(expected, key, value)
    try:
        new_text = _edit(text, changes, note)
        if parse_toml(new_text, file, RecipeError) == expected:
            return RecipeEdit(new_text, True, tuple(words))
    except (ValueError, RecipeError):
        pass
    fresh = "# Written by goalkit tune" + (f": {note}" if note else "") + "\n" + dump_toml(expected)
    if parse_toml(fresh, file, RecipeError) != expected:  # pragma: no cover - dump_toml bug
        raise GoalkitError("cannot write the tuned recipe: the rewritten text does not read back "
                           "as the same recipe", file=file)
    return RecipeEdit(fresh, False, tuple(words))


def _edit(text: str, changes: dict, note: str) -> str:
    slots, table_end = _locate(text)
    edits: list[tuple[int, int, str]] = []
    if "reward.threshold" not in slots:
        raise ValueError("threshold not found")
    thr_slot = slots["reward.threshold"]
    for key, value in changes.items():
        slot = slots.get(key)
        if value is _DELETE:
            if slot is None:
                raise ValueError(f"{key} not found")
            edits.append((slot.line_start, slot.line_start, f"{slot.indent}# removed by goalkit tune: "))
            continue
        if slot is not None:
            edits.append((slot.value_start, slot.value_end, toml_value(value)))
        elif key == "reward.distance":
            edits.append((thr_slot.line_start, thr_slot.line_start,
                          f"{thr_slot.indent}distance = {toml_value(value)}\n"))
        else:
            raise ValueError(f"{key} not found")
    if note:
        edits.append((thr_slot.line_start, thr_slot.line_start, f"{thr_slot.indent}# {note}\n"))
    # apply from the end; at one offset, later-listed insertions go first in the text
    edits.sort(key=lambda e: (e[0], e[1]), reverse=True)
    out = text
    for a, b, new in edits:
        out = out[:a] + new + out[b:]
    return out


def write_tuned_recipe(recipe, out, *, threshold, distance: str | None = None, note: str = "",
                       replace: bool = False) -> RecipeEdit:
    """Write a copy of ``recipe`` (a loaded Recipe) to ``out`` with the new threshold.

    The copy is read back with :func:`goalkit.pipeline.recipe.parse_recipe` before it is
    written, so a copy that would not load is never written. ``out`` may not be one of the
    recipe's inputs; an existing file there is replaced only with ``replace`` and only if it is
    a recipe.

    Raises
    ------
    GoalkitError
        When ``out`` is a folder or its folder does not exist, or the file cannot be written.
    """
    from goalkit.outputs import check_no_overlap
    from goalkit.pipeline.recipe import is_recipe_file, parse_recipe

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
