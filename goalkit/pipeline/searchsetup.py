"""Set up a build's goal search and goal library (codes 6-8) on its relabelling context; report them.

Called once by :func:`goalkit.pipeline.plan.make_plan`. Both objects are picklable plan data
(the faiss indexes travel serialised), so worker processes and Dask tasks get them with the
plan; :func:`attach_searches` rebuilds them deterministically from the goal table.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from goalkit.relabel.library import match_library, read_targets
from goalkit.relabel.search import build_goal_search
from goalkit.write.provenance import describe_files


def attach_searches(recipe, context, goal_table, goal_map, episode_ids, lengths, splits):
    """Return ``context`` with ``neighbours`` / ``library`` set for the active strategies.

    Parameters
    ----------
    recipe : Recipe
    context : RelabelContext
    goal_table : ndarray (S, G)
        phi of every kept state (global state rows), in the stored goal precision.
    goal_map : GoalMap
    episode_ids, lengths, splits : ndarray
        Kept episodes, their transition counts and split codes.

    Raises
    ------
    RecipeError
        A split with one episode (neighbour, near_miss); a bad library file (library).
    """
    mix = recipe.mixture
    active = {n for n, w in mix.weights.items() if w > 0}
    changes = {}
    hops = [n for n in ("neighbour", "near_miss") if n in active]
    if hops:
        changes["neighbours"] = build_goal_search(
            goal_table, episode_ids, lengths, splits, recipe.reward, k=mix.neighbours, method=mix.index,
            target_recall=mix.recall, seed=recipe.seed, file=recipe.file, key=f"relabel.weights.{hops[0]}")
    if "library" in active:
        targets = read_targets(mix.library, goal_map, np.dtype(recipe.goal.dtype))
        changes["library"] = match_library(targets, goal_table, episode_ids, lengths, recipe.reward,
                                           file=mix.library)
    return replace(context, **changes) if changes else context


def search_summary(context) -> dict:
    """Summary entries: recall reached per split, library matches; plus warnings (JSON-able)."""
    out: dict = {}
    warnings = []
    search = getattr(context, "neighbours", None)
    if search is not None:
        per = {}
        for split, rep in search.describe().items():
            per[split] = {"method": rep["index"]["method"], "k": rep["k"], "target_recall": rep["target_recall"],
                          "recall": rep["recall"], "recall_lower": rep["recall_lower"],
                          "recall_queries": rep["recall_queries"], "breadth": rep["breadth"]}
            if rep["recall_lower"] < rep["target_recall"]:
                warnings.append(f"the {split} neighbour index reaches recall@{rep['k']} {rep['recall']:.3f} "
                                f"(lower bound {rep['recall_lower']:.3f}), below the target "
                                f"{rep['target_recall']}; use index = \"exact\" or a smaller recall")
        out["neighbour_index"] = per
    lib = getattr(context, "library", None)
    if lib is not None:
        d = lib.describe()
        out["library"] = {"targets": d["targets"], "matched_states": d["matched_states"],
                          "match_counts": d["match_counts"], "unreached": d["unreached"]}
        if d["unreached"]:
            shown = ", ".join(str(i) for i in d["unreached"][:10]) + (" ..." if len(d["unreached"]) > 10 else "")
            warnings.append(f"{len(d['unreached'])} of {d['targets']} library targets are reached by no logged "
                            f"state: {shown}")
    if warnings:
        out["warnings"] = warnings
    return out


def add_to_summary(summary: dict, context) -> dict:
    """Merge :func:`search_summary` into a build summary (warnings appended); returns ``summary``."""
    extra = search_summary(context)
    warnings = extra.pop("warnings", [])
    summary.update(extra)
    if warnings:
        summary.setdefault("warnings", []).extend(warnings)
    return summary


def search_provenance(context) -> dict:
    """Provenance entries: full index reports per split, the library file and its matches."""
    out: dict = {}
    search = getattr(context, "neighbours", None)
    if search is not None:
        out["neighbour_index"] = search.describe()
    lib = getattr(context, "library", None)
    if lib is not None:
        out["library"] = {**lib.describe(), "files": describe_files([lib.file])}
    return out


def summary_lines(summary: dict) -> list:
    """Text lines of the build summary for the neighbour index and the library (may be empty)."""
    lines = []
    for split, r in (summary.get("neighbour_index") or {}).items():
        lines.append(f"  neighbour index ({split}): {r['method']}, recall@{r['k']} {r['recall']:.3f} "
                     f"(lower bound {r['recall_lower']:.3f}, target {r['target_recall']}, "
                     f"{r['recall_queries']} queries)")
    lib = summary.get("library")
    if lib:
        lines.append(f"  library: {lib['targets']} targets, {lib['matched_states']:,} matched states, "
                     f"{len(lib['unreached'])} never reached")
    return lines
