"""Scan every source a recipe names: files, episodes, transitions, arrays and the layout used.

``goalkit scan RECIPE.toml`` prints this per source, before a build, so that a multi-source
archive's problems (a file that does not fit its layout, a layout that cannot be detected) are
seen for every source at once.
"""

from __future__ import annotations

import os
from dataclasses import replace

import numpy as np

from goalkit.archive import SourceSpec
from goalkit.errors import GoalkitError
from goalkit.logs.bagfile import is_bag_path
from goalkit.logs.detect import found_arrays
from goalkit.logs.layout import layout_to_toml
from goalkit.logs.multi import MultiSource, expand_entries, source_layout
from goalkit.logs.opener import open_logs


def _specs(recipe) -> tuple:
    """The recipe's sources; a one-log ``[logs]`` recipe as one unnamed source."""
    if recipe.sources:
        return recipe.sources
    return (SourceSpec("", (str(recipe.logs_path),), None, recipe.skip_bad_episodes, "logs.path",
                       str(recipe.layout_path or "")),)


def _arrays(path) -> dict | None:
    """The arrays of one log file (HDF5, NPZ, per-file folder); None for bags and step tables."""
    if is_bag_path(path) or str(path).lower().endswith(".parquet"):
        return None
    try:
        shape, where, arrays, _ = found_arrays(path)
    except GoalkitError as exc:
        return {"file": str(path), "error": exc.render(), "arrays": []}
    return {"file": str(path), "looks_like": shape, "where": where,
            "arrays": [{"key": k, "shape": list(s), "dtype": d} for k, s, d in arrays]}


def scan_sources(recipe) -> dict:
    """Open every source of ``recipe`` on its own and report on it.

    Parameters
    ----------
    recipe : Recipe
        A loaded recipe (``goalkit.load_recipe``).

    Returns
    -------
    dict
        ``recipe`` (its file), ``ok`` (every source opened) and ``sources``: per source, in the
        recipe's order, ``name`` ("" for ``[logs]``), ``key`` (where the recipe names it),
        ``files`` (expanded, in reading order), ``episodes``, ``transitions``, ``lengths``
        (min/max) or None, ``layout`` (``{"from": "file", "path"}`` or ``{"from": "detected"}``,
        with its ``text``) , ``arrays`` (of the first file: key, shape, dtype), ``keys`` (role,
        key, dtype, shape per file) and ``problem`` (the one-line error that stopped it, or None).

    Raises
    ------
    LogError, RecipeError
        A missing file, a glob that matches nothing, a folder without logs: the recipe cannot
        name its files (one line naming the recipe, its key and the file).
    """
    out = []
    for spec in _specs(recipe):
        layout = source_layout(spec)
        if recipe.sources:
            files = expand_entries(spec.entries, layout.shape if layout is not None else None,
                                   file=recipe.file, key=spec.key)
        else:
            files = [str(recipe.logs_path)]
        item = {"name": spec.name, "key": spec.key, "files": files, "episodes": None, "transitions": None,
                "lengths": None, "layout": ({"from": "file", "path": spec.layout_path} if spec.layout_path
                                            else {"from": "recipe"} if layout is not None
                                            else {"from": "detected"}),
                "arrays": _arrays(files[0]) if files else None, "keys": [], "problem": None}
        try:
            if len(files) == 1:
                src = open_logs(files[0], layout, spec.skip_bad_episodes)
            else:
                src = MultiSource([replace(spec, layout=layout)], file=recipe.file)
            lengths = np.asarray(src.lengths, dtype=np.int64)
            item["episodes"] = int(lengths.shape[0])
            item["transitions"] = int(lengths.sum())
            if lengths.size:
                item["lengths"] = {"min": int(lengths.min()), "max": int(lengths.max())}
            item["layout"]["text"] = layout_to_toml(src.layout)
            item["keys"] = [{**k, "file": k.get("file", src.path)} for k in src.key_info()]
            item["skipped"] = len(src.skipped)
        except GoalkitError as exc:
            item["problem"] = exc.render()
        out.append(item)
    return {"recipe": str(recipe.file), "ok": all(s["problem"] is None for s in out), "sources": out}


def render_sources(report: dict) -> list[str]:
    """The human-readable form of :func:`scan_sources`' report."""
    lines = [f"recipe: {report['recipe']}"]
    for s in report["sources"]:
        title = f"source '{s['name']}'" if s["name"] else "logs"
        lines += ["", f"{title} ({s['key']}): {len(s['files'])} file(s)"]
        lines += [f"  {os.path.basename(f) if len(s['files']) > 8 else f}" for f in s["files"][:20]]
        if len(s["files"]) > 20:
            lines.append(f"  ... and {len(s['files']) - 20} more (see --json)")
        lay = s["layout"]
        where = {"file": f"layout file {lay.get('path')}", "recipe": "layout written in the recipe",
                 "detected": "layout detected from the files"}[lay["from"]]
        if s["problem"] is None:
            L = s["lengths"] or {"min": 0, "max": 0}
            lines.append(f"  episodes {s['episodes']}, transitions {s['transitions']}, length {L['min']} .. "
                         f"{L['max']}; {where}")
            if lay["from"] == "detected":
                lines += [f"    {x}".rstrip() for x in lay["text"].splitlines()]
        else:
            lines.append(f"  NOT READ ({where}): {s['problem']}")
        arrays = s["arrays"]
        if arrays and arrays.get("arrays"):
            lines.append(f"  arrays {arrays['where']} of {os.path.basename(arrays['file'])} (key, shape, dtype):")
            width = max(len(a["key"]) for a in arrays["arrays"])
            lines += [f"    {a['key']:<{width}}  {str(tuple(a['shape'])):<16} {a['dtype']}"
                      for a in arrays["arrays"]]
    return lines
