"""What a set records about its log sources: per-source provenance and summary (issue 12).

Only builds whose recipe reads several files or sources (``Recipe.sources``) record these; a
one-file recipe's provenance and summary are as before.
"""

from __future__ import annotations

from pathlib import Path

from goalkit.logs.layout import layout_to_toml
from goalkit.rows import SPLITS


def layout_texts(recipe, source) -> dict:
    """Source code -> the layout text it was read with (the file's text, else the proposed layout)."""
    out = {}
    for code, spec in enumerate(recipe.sources):
        if spec.layout_text:
            out[code] = spec.layout_text
        elif spec.layout_path:
            out[code] = Path(spec.layout_path).read_text(encoding="utf-8")
        else:
            layout = source.layouts.get(code) or next(p.log.layout for p in source.parts if p.code == code)
            out[code] = layout_to_toml(layout)
    return out


def sources_provenance(recipe, source) -> list:
    """One record per source, in the recipe's order: name, expanded paths, layout, episode counts."""
    texts = layout_texts(recipe, source)
    paths = dict(source.file_entries)
    out = []
    for code, spec in enumerate(recipe.sources):
        mine = source.episode_sources == code
        out.append({"name": spec.name, "code": code, "paths": list(paths.get(code, [])),
                    "layout_path": spec.layout_path, "layout_text": texts[code],
                    "skip_bad_episodes": bool(spec.skip_bad_episodes),
                    "episodes": int(mine.sum()), "transitions": int(source.lengths[mine].sum())})
    return out


def sources_summary(plan, source) -> dict:
    """Per source: episodes, transitions and rows per split (from the plan, not the rows)."""
    gpt = plan.recipe.mixture.goals_per_transition
    own = getattr(plan.recipe, "source_goals", None)
    of = source.source_of(plan.episode_ids)
    out = {}
    for code, name in enumerate(source.source_names):
        mine = of == code
        k = int(own[code]) if own is not None else int(gpt)
        out[name or "logs"] = {
            "episodes": int(mine.sum()), "transitions": int(plan.lengths[mine].sum()), "goals_per_transition": k,
            "rows": {s: int(plan.lengths[mine & (plan.splits == c)].sum()) * k for c, s in enumerate(SPLITS)}}
    return out
