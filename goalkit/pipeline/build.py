"""Single-process build: plan, stream chunks through the chunk task, write, summarise."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from goalkit import __version__
from goalkit.logs.episodes import chunk_bounds
from goalkit.pipeline.chunk import relabel_chunk
from goalkit.pipeline.plan import make_plan, strategy_names
from goalkit.pipeline.summary import SummaryBuilder
from goalkit.write.provenance import describe_files
from goalkit.write.writer import SetWriter

#: Default number of output rows produced per chunk task (bounds the build's memory).
CHUNK_ROWS = 131_072


@dataclass(frozen=True)
class BuildResult:
    """What a build wrote.

    Attributes
    ----------
    path : Path
        The dataset.
    summary : dict
        Rows per split, per-strategy counts and reached fractions, distance quantiles, warnings.
    """

    path: Path
    summary: dict


def chunk_transitions(plan, rows_per_chunk: int = CHUNK_ROWS) -> int:
    """Transitions per chunk so that a chunk yields about ``rows_per_chunk`` rows."""
    return max(1, rows_per_chunk // plan.recipe.mixture.goals_per_transition)


def provenance(plan, source) -> dict:
    """The dataset's provenance record (what it was built from, and how)."""
    recipe = plan.recipe
    files = list(source.files)
    if recipe.layout_path is not None:
        layout_text = Path(recipe.layout_path).read_text(encoding="utf-8")
    else:
        layout_text = ""
    extra = []
    if recipe.goal.embedding is not None:
        extra = describe_files([recipe.goal.embedding])
    return {
        "goalkit_version": __version__,
        "recipe_file": str(Path(recipe.file).resolve()) if recipe.file else "",
        "logs_path": str(recipe.logs_path),
        "layout_path": str(recipe.layout_path) if recipe.layout_path else "",
        "layout_text": layout_text,
        "log_files": describe_files(files),
        "embedding_files": extra,
        "goal_map": plan.goal_map.describe(),
        "reward": recipe.reward.describe(),
        "relabel": recipe.mixture.describe(),
        "split": {"validation": recipe.validation, "salt": recipe.salt},
        "episodes": int(len(plan.episode_ids)),
        "transitions": plan.total_transitions,
        "log_notes": list(getattr(source, "notes", [])),
        "skipped_episodes": [[int(e), str(r)] for e, r in getattr(source, "skipped", [])],
        "strategies": {int(k): v for k, v in strategy_names(recipe.mixture).items()},
    }


def build(recipe, *, source=None, max_rows_per_chunk: int = CHUNK_ROWS, progress=None) -> BuildResult:
    """Build the dataset a recipe describes, in this process.

    Parameters
    ----------
    recipe : Recipe
        A checked recipe (see :func:`goalkit.pipeline.recipe.load_recipe`).
    max_rows_per_chunk : int
        Output rows per chunk task; only memory and speed depend on it, never the output bytes.
    source : LogSource, optional
        Already opened logs (default: open the recipe's logs with its layout).
    progress : callable, optional
        Called as ``progress(transitions_done_in_chunk, total_transitions)`` after each chunk.

    Returns
    -------
    BuildResult
    """
    plan, source = make_plan(recipe, source)
    per_chunk = chunk_transitions(plan, max_rows_per_chunk)
    gpt = recipe.mixture.goals_per_transition
    summary = SummaryBuilder(strategy_names(recipe.mixture), plan.total_transitions * gpt, recipe.seed)
    out = recipe.output
    with SetWriter(out.path, plan.columns, chunk_rows=out.chunk_rows, compression=out.compression) as writer:
        for a, b in chunk_bounds(plan.lengths, per_chunk):
            chunk = source.read(a, b)
            rows = relabel_chunk(plan, chunk)
            for split, cols in rows.columns.items():
                writer.add(split, cols, rows.keys[split])
                summary.add(split, cols, rows.keys[split])
            writer.flush()
            if progress is not None:
                progress(int(plan.lengths[a:b].sum()), plan.total_transitions)
        result = summary.result()
        prov = provenance(plan, source)
        episodes = {s: int(np.sum(plan.splits == c)) for c, s in enumerate(("train", "validation"))}
        path = writer.close(
            attrs={"goalkit_version": __version__, "mode": out.mode, "seed": recipe.seed,
                   "recipe": recipe.text, "provenance": prov, "summary": result},
            split_attrs={s: {"episodes": n} for s, n in episodes.items()},
        )
    return BuildResult(path=path, summary=result)
