"""Single-process build: plan, stream chunks through the chunk task, write, summarise."""

from __future__ import annotations

import sys
from collections import deque
from contextlib import contextmanager
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from goalkit import __version__
from goalkit.logs.episodes import chunk_bounds
from goalkit.pipeline.chunk import relabel_chunk
from goalkit.pipeline.plan import make_plan, split_rows, strategy_names
from goalkit.pipeline.summary import SummaryBuilder
from goalkit.relabel.attach import add_to_summary, search_provenance
from goalkit.write.provenance import describe_files
from goalkit.write.writer import SetWriter

#: Default output rows per chunk of a build in one process (bounds the build's memory).
CHUNK_ROWS = 65_536
#: Default output rows per shard of a sharded build (each shard is a task and a file).
SHARD_ROWS = 131_072
#: Chunks relabelled ahead of the one being written.
LOOKAHEAD = 2


@dataclass(frozen=True)
class BuildResult:
    """What a build wrote.

    Attributes
    ----------
    path : Path
        The dataset.
    summary : dict
        Rows per split, per-strategy counts and reached fractions, distance quantiles, warnings.
    shards : dict or None
        Sharded builds only: ``{"total", "reused", "computed", "runner"}``.
    """

    path: Path
    summary: dict
    shards: dict | None = None


def relabelled_chunks(plan, source, bounds, ahead: bool = True, summary=None):
    """Yield ``(start, stop, ChunkRows)`` for each chunk of episodes, in order.

    The observation and action columns come as deferred gathers, for :class:`SetWriter` to
    copy straight into its blocks (see :func:`~goalkit.pipeline.chunk.relabel_chunk`).

    With ``ahead``, the next chunks are read (on one helper thread) and relabelled (on another)
    while the caller writes the current one (numpy, hashing and HDF5 I/O release the GIL for
    much of that work); the results, and so the output bytes, are the same either way. With ``summary`` (a
    :class:`SummaryBuilder`), each chunk's rows are also counted into it, on the same thread
    and in chunk order.
    """
    def task(chunk):
        rows = relabel_chunk(plan, chunk, defer_gathers=True)
        if summary is not None:
            for split, cols in rows.columns.items():
                summary.add(split, cols, rows.keys[split])
        return rows

    if not ahead:
        for a, b in bounds:
            yield a, b, task(source.read(a, b))
        return
    # two stages on their own threads: reading chunk k + 1 overlaps relabelling chunk k
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-read") as reader, \
            ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-chunk") as pool:
        pending: deque = deque()
        for a, b in bounds:
            read = reader.submit(source.read, a, b)
            pending.append((a, b, pool.submit(lambda read=read: task(read.result()))))
            if len(pending) > LOOKAHEAD:
                a0, b0, job = pending.popleft()
                yield a0, b0, job.result()
        while pending:
            a0, b0, job = pending.popleft()
            yield a0, b0, job.result()


def chunk_transitions(plan, rows_per_chunk: int = CHUNK_ROWS) -> int:
    """Transitions per chunk so that a chunk yields about ``rows_per_chunk`` rows."""
    return max(1, rows_per_chunk // plan.recipe.mixture.goals_per_transition)


def provenance(plan, source, log_files=None) -> dict:
    """The dataset's provenance record (what it was built from, and how).

    ``log_files`` is the log files' description if already computed
    (:func:`goalkit.write.provenance.describe_files` of ``source.files``).
    """
    recipe = plan.recipe
    files = list(source.files)
    if recipe.layout_path is not None:
        layout_text = Path(recipe.layout_path).read_text(encoding="utf-8")
    elif getattr(source, "layout", None) is not None:
        from goalkit.logs.layout import layout_to_toml

        layout_text = layout_to_toml(source.layout)  # the detected layout, so verify reads the same way
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
        "log_files": describe_files(files) if log_files is None else log_files,
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
        **search_provenance(plan.context),
    }


def build(recipe, *, source=None, max_rows_per_chunk: int | None = None, progress=None, workers: int = 0,
          scheduler: str | None = None, client=None, fresh: bool = False, replace: bool = False) -> BuildResult:
    """Build the dataset a recipe describes, in this process or scaled out over shards.

    Parameters
    ----------
    recipe : Recipe
        A checked recipe (see :func:`goalkit.pipeline.recipe.load_recipe`).
    max_rows_per_chunk : int, optional
        Output rows per chunk task; only memory and speed depend on it, never the output bytes.
        Default :data:`CHUNK_ROWS` in one process, :data:`SHARD_ROWS` per shard.
    source : LogSource, optional
        Already opened logs (default: open the recipe's logs with its layout).
    progress : callable, optional
        Called as ``progress(transitions_done_in_chunk, total_transitions)`` after each chunk.
    workers : int
        0: build in this process (no shards). N >= 1: N local worker processes, each chunk a
        resumable shard (see docs/scaling.md).
    scheduler : str, optional
        Address of a running dask.distributed scheduler to run the shards on.
    client : distributed.Client, optional
        An existing Dask client to run the shards on (not closed).
    fresh : bool
        Sharded builds: discard the shards of an interrupted run instead of resuming.
    replace : bool
        Replace an existing goalkit set at the output path (``--replace``). Without it an existing
        output is refused before any work; a file that is not a goalkit set is never replaced.

    Returns
    -------
    BuildResult
        The same file bytes, summary and provenance whichever way it was built.

    Raises
    ------
    OutputError
        Before any work, when the output (or the build folder of a sharded build) is or touches
        an input, or exists and may not be replaced.
    """
    sharded = bool(workers) or scheduler is not None or client is not None
    check_outputs(recipe, sharded=sharded, replace=replace, source=source)
    if sharded:
        from goalkit.pipeline.sharded import build_sharded

        if scheduler is not None or client is not None:
            from goalkit.pipeline.dask_build import DaskRunner

            runner = DaskRunner(address=scheduler, client=client)
        else:
            from goalkit.pipeline.workers import LocalRunner

            runner = LocalRunner(workers)
        return build_sharded(recipe, runner, source=source, rows_per_shard=max_rows_per_chunk or SHARD_ROWS,
                             progress=progress, fresh=fresh, replace=replace)
    with short_gil_switch():
        return _build_here(recipe, source, max_rows_per_chunk or CHUNK_ROWS, progress, replace)


def check_outputs(recipe, *, sharded: bool = False, replace: bool = False, source=None) -> None:
    """Refuse, before any work, a build that would write over one of its inputs or an existing output.

    The inputs are the recipe's (:meth:`Recipe.inputs`: recipe file, logs with every file of a
    log folder, layout, embedding, goal library) and an opened ``source``'s files; the outputs
    are the dataset and, for a sharded build, its build folder ``.NAME.shards``.

    Raises
    ------
    OutputError
        One line naming the output and the input, or saying how to replace an existing output.
    """
    from goalkit.outputs import check_no_overlap, refuse_existing
    from goalkit.pipeline.buildfolder import folder_of
    from goalkit.write.format import is_goal_set

    out = recipe.output.path
    inputs = list(recipe.inputs()) + [("log file", f) for f in getattr(source, "files", None) or []]
    outputs = [("output", out)] + ([("build folder", folder_of(out))] if sharded else [])
    check_no_overlap(inputs, outputs)
    refuse_existing(out, replace=replace, ours=is_goal_set, what="dataset")


#: GIL switch interval (s) while a build runs its thread pipeline in this process.
SWITCH_INTERVAL = 0.001


@contextmanager
def short_gil_switch(interval: float = SWITCH_INTERVAL):
    """Shorten the interpreter's GIL switch interval for the duration of the block.

    The build's stages hand the GIL to each other around every HDF5 write, read and hash;
    with the default 5 ms interval a thread coming back from one waits behind another
    thread's Python code, and the stages run in convoy. The previous interval is restored
    afterwards. Only the timing of thread switches changes, never the output.
    """
    before = sys.getswitchinterval()
    sys.setswitchinterval(min(before, interval))
    try:
        yield
    finally:
        sys.setswitchinterval(before)


def _build_here(recipe, source, rows_per_chunk: int, progress, replace: bool = False) -> BuildResult:
    """The single-process build (see :func:`build`)."""
    plan, source = make_plan(recipe, source)
    per_chunk = chunk_transitions(plan, rows_per_chunk)
    gpt = recipe.mixture.goals_per_transition
    summary = SummaryBuilder(strategy_names(recipe.mixture), plan.total_transitions * gpt, recipe.seed)
    out = recipe.output
    # the log files' checksums (provenance) are read on their own thread, alongside the build
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-logsum") as side, \
            SetWriter(out.path, plan.columns, chunk_rows=out.chunk_rows, compression=out.compression,
                      total_rows=split_rows(plan), replace=replace) as writer:
        log_files = side.submit(describe_files, list(source.files))
        for a, b, rows in relabelled_chunks(plan, source, chunk_bounds(plan.lengths, per_chunk),
                                            summary=summary):
            for split, cols in rows.columns.items():
                writer.add(split, cols, rows.keys[split])
            writer.flush()
            if progress is not None:
                progress(int(plan.lengths[a:b].sum()), plan.total_transitions)
        path, result = close_dataset(writer, plan, source, summary, log_files=log_files.result())
    return BuildResult(path=path, summary=result)


def close_dataset(writer, plan, source, summary, log_files=None):
    """Finish a build's file: summary, provenance and attributes, then the writer's rename.

    Shared by the single-process and the sharded build, so their files cannot drift apart.

    Returns
    -------
    (Path, dict)
        The dataset path and its summary.
    """
    recipe, out = plan.recipe, plan.recipe.output
    result = final_summary(summary, plan, source)
    prov = provenance(plan, source, log_files=log_files)
    episodes = {s: int(np.sum(plan.splits == c)) for c, s in enumerate(("train", "validation"))}
    path = writer.close(
        attrs={"goalkit_version": __version__, "mode": out.mode, "seed": recipe.seed,
               "recipe": recipe.text, "provenance": prov, "summary": result},
        split_attrs={s: {"episodes": n} for s, n in episodes.items()},
    )
    return path, result


def final_summary(summary, plan, source) -> dict:
    """The summary stored in a set, from a filled :class:`SummaryBuilder` (shared with verify)."""
    result = add_to_summary(summary.result(), plan.context)
    skipped = list(getattr(source, "skipped", []))
    result["skipped_episodes"] = len(skipped)
    if skipped:
        result["warnings"].append(f"{len(skipped)} episode(s) of the logs failed validation and were skipped "
                                  f"(first: episode {skipped[0][0]}); the provenance lists them")
    return result
