"""The build engine: one build, whichever producer computes its chunk rows.

Every build runs the same steps, here:

1. Check the outputs against the inputs (:func:`check_outputs`), before any work.
2. Plan (:func:`~goalkit.pipeline.plan.make_plan`: open the logs, check the recipe, split, goal
   table) and cut the kept episodes into ordered chunks
   (:func:`~goalkit.pipeline.shardfiles.plan_shards`).
3. Read the build's inputs once (:class:`BuildInputs`: recipe text and seed, layout text, SHA-256
   of every log, embedding and library file), on a side thread; they give both the shard key and
   the provenance.
4. A producer hands back each chunk's rows, strictly in chunk order; they go to one
   :class:`~goalkit.write.writer.SetWriter` and one :class:`~goalkit.pipeline.summary.SummaryBuilder`.
5. Close: summary, provenance and attributes (:func:`close_dataset`), then the writer's rename.

Only the producer varies:

- :class:`~goalkit.pipeline.inprocess.InProcessProducer`: threads in this process (the default);
- :class:`~goalkit.pipeline.sharded.ShardProducer` with
  :class:`~goalkit.pipeline.workers.LocalRunner` (``workers=N``) or
  :class:`~goalkit.pipeline.dask_build.DaskRunner` (``scheduler=`` or ``client=``): resumable
  shard files computed by worker processes;
- with ``keep_work``, either one wrapped in :class:`~goalkit.pipeline.reuse.ReuseProducer`: the
  chunks are units that never span two log files, those kept from an earlier build (same key)
  are read from the work folder ``.NAME.work`` and only the others go to the wrapped producer.

The writer's output does not depend on how the rows were chunked or who computed them, so the
file's bytes are the same for every producer.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from dataclasses import replace as dataclass_replace
from pathlib import Path

import numpy as np

from goalkit import __version__
from goalkit.logs import spare
from goalkit.logs.layout import layout_to_toml
from goalkit.outputs import check_no_overlap, refuse_existing, small_toml
from goalkit.pipeline.buildfolder import folder_of
from goalkit.pipeline.sources import layout_texts, sources_provenance, sources_summary
from goalkit.pipeline.dask_build import DaskRunner
from goalkit.pipeline.earlydigest import EarlyDigests
from goalkit.pipeline.inprocess import CHUNK_ROWS, InProcessProducer
from goalkit.pipeline.plan import make_plan, split_rows, strategy_names
from goalkit.pipeline.reuse import ReuseProducer
from goalkit.pipeline.sharded import SHARD_ROWS, ShardProducer
from goalkit.pipeline.shardfiles import plan_shards
from goalkit.pipeline.summary import SummaryBuilder
from goalkit.pipeline.workers import LocalRunner
from goalkit.pipeline.workfolder import work_folder_of
from goalkit.pipeline.searchsetup import add_to_summary, search_provenance
from goalkit.rows import SPLITS
from goalkit.write.card import card_paths, check_card_outputs, graph_plot_path, write_card
from goalkit.write.format import is_goal_set
from goalkit.write.provenance import declared_folder, describe_files, with_relative
from goalkit.write.writer import OutputWriteError, SetWriter

__all__ = ["CHUNK_ROWS", "SHARD_ROWS", "BuildInputs", "BuildResult", "build", "check_outputs",
           "chunk_transitions", "close_dataset", "final_summary", "provenance", "read_inputs"]


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
    card : tuple of Path
        The dataset card and its coverage PNG (empty with ``card=False``).
    seconds : float or None
        Wall-clock time of the build (not stored in the set, which must not depend on it).
    file_bytes : int or None
        Size of the set file.
    reuse : dict or None
        Builds with ``keep_work`` only: ``{"episodes": {"reused", "new"}, "units": {"reused",
        "computed"}, "folder", "files", "bytes", "reason"}`` (episodes whose rows were taken from
        the work folder and episodes relabelled now; ``reason`` says why nothing could be reused,
        else None). Not stored in the set, whose bytes do not depend on it.
    """

    path: Path
    summary: dict
    shards: dict | None = None
    card: tuple = ()
    seconds: float | None = None
    file_bytes: int | None = None
    reuse: dict | None = None


@dataclass(frozen=True)
class BuildInputs:
    """Everything outside the plan that a build's rows depend on, read once.

    Attributes
    ----------
    recipe_text : str
    seed : int
        The effective seed (``--seed`` included).
    layout_text : str
        The layout file's text, or the detected layout as TOML ("" when there is neither).
    log_files, embedding_files, library_files : list of dict
        ``{"path", "bytes", "sha256"}`` of each file (:func:`goalkit.write.provenance.describe_files`);
        ``library_files`` only when read for a shard key.
    """

    recipe_text: str
    seed: int
    layout_text: str
    log_files: list
    embedding_files: list
    library_files: list

    def key_record(self) -> dict:
        """The JSON-able record a shard build key is hashed from (with the partition added,
        see :func:`goalkit.pipeline.buildfolder.build_key`)."""
        return {
            "goalkit_version": __version__,
            "recipe_text": self.recipe_text,
            "seed": self.seed,
            "layout_text": self.layout_text,
            "log_files": [[f["path"], f["bytes"], f["sha256"]] for f in self.log_files],
            # a changed embedding or goal library invalidates shards
            "embedding_files": [[f["path"], f["bytes"], f["sha256"]] for f in self.embedding_files],
            "library_files": [[f["path"], f["bytes"], f["sha256"]] for f in self.library_files],
        }


def read_inputs(plan, source, log_files=None, with_library: bool = True) -> BuildInputs:
    """Read a build's inputs: layout text and the digests of its files.

    Parameters
    ----------
    plan : BuildPlan
    source : LogSource
    log_files : list of dict, optional
        The log files' description if already computed (else computed from ``source.files``).
    with_library : bool
        Also digest the recipe's goal library (a shard key needs it; the provenance does not).
    """
    recipe = plan.recipe
    if recipe.sources is not None:   # every source's layout, for the shard key
        layout_text = "".join(f"# source {c}\n{t}" for c, t in sorted(layout_texts(recipe, source).items()))
    elif recipe.layout_path is not None:
        layout_text = Path(recipe.layout_path).read_text(encoding="utf-8")
    elif getattr(source, "layout", None) is not None:
        layout_text = layout_to_toml(source.layout)  # the detected layout, so verify reads the same way
    else:
        layout_text = ""
    library = getattr(recipe.mixture, "library", None)
    return BuildInputs(
        recipe_text=recipe.text,
        seed=recipe.seed,
        layout_text=layout_text,
        log_files=describe_files(list(source.files)) if log_files is None else log_files,
        embedding_files=describe_files([recipe.goal.embedding]) if recipe.goal.embedding is not None else [],
        library_files=describe_files([library]) if with_library and library is not None else [],
    )


def chunk_transitions(plan, rows_per_chunk: int = CHUNK_ROWS) -> int:
    """Transitions per chunk so that a chunk yields about ``rows_per_chunk`` rows."""
    return max(1, rows_per_chunk // plan.most_goals)


def provenance(plan, source, log_files=None, inputs: BuildInputs | None = None) -> dict:
    """The dataset's provenance record (what it was built from, and how).

    ``inputs`` are the build's inputs if already read (else read here, with ``log_files`` as the
    log files' description if already computed).
    """
    recipe = plan.recipe
    if inputs is None:
        inputs = read_inputs(plan, source, log_files=log_files, with_library=False)
    several = {} if recipe.sources is None else {"sources": sources_provenance(recipe, source)}
    return {
        "goalkit_version": __version__,
        "recipe_file": str(Path(recipe.file).resolve()) if recipe.file else "",
        "logs_path": "" if several else str(recipe.logs_path),
        "layout_path": str(recipe.layout_path) if recipe.layout_path else "",
        "layout_text": "" if several else inputs.layout_text,
        **several,
        "log_files": inputs.log_files,
        "embedding_files": inputs.embedding_files,
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
          scheduler: str | None = None, client=None, fresh: bool = False, replace: bool = False,
          card: bool = True, keep_work: bool = False) -> BuildResult:
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
        The same holds for the dataset card.
    card : bool
        Also write the dataset card ``NAME.card.md`` and its plot ``NAME.card-goals.png`` beside
        the set (:mod:`goalkit.write.card`).
    keep_work : bool
        Keep every episode's rows in the work folder ``.NAME.work`` beside the set, and take the
        rows of episodes whose log file, position and everything else they depend on are
        unchanged from there instead of relabelling them (:mod:`goalkit.pipeline.reuse`). The
        set's bytes are the same as without it.

    Returns
    -------
    BuildResult
        The same file bytes, summary and provenance whichever way it was built.

    Raises
    ------
    OutputError
        Before any work, when the output (or the build folder of a sharded build) is or touches
        an input, or exists and may not be replaced.
    GoalkitError
        Sharded builds: ShardError naming the shard and episodes when a task fails;
        DatasetError when the build folder or the output cannot be written.
    """
    import time

    started = time.perf_counter()
    sharded = bool(workers) or scheduler is not None or client is not None
    check_outputs(recipe, sharded=sharded, replace=replace, source=source, card=card, keep_work=keep_work)
    if scheduler is not None or client is not None:
        producer = ShardProducer(DaskRunner(address=scheduler, client=client), fresh=fresh)
    elif workers:
        producer = ShardProducer(LocalRunner(workers), fresh=fresh)
    else:
        producer = InProcessProducer()
    if keep_work:
        producer = ReuseProducer(producer, recipe.output.path)
    result = run_build(recipe, producer, source=source, rows_per_chunk=max_rows_per_chunk,
                       progress=progress, replace=replace)
    written = tuple(write_card(result.path, replace=replace)) if card else ()
    return dataclass_replace(result, card=written, seconds=time.perf_counter() - started,
                             file_bytes=result.path.stat().st_size)


def run_build(recipe, producer, *, source=None, rows_per_chunk: int | None = None, progress=None,
              replace: bool = False) -> BuildResult:
    """Run a build with ``producer`` (see the module's description; outputs already checked).

    Parameters
    ----------
    recipe : Recipe
    producer : InProcessProducer or ShardProducer
    source, progress, replace
        As for :func:`build`.
    rows_per_chunk : int, optional
        Output rows per chunk (default: the producer's ``rows_per_chunk``).

    Returns
    -------
    BuildResult
    """
    # a spare helper process for the one-process build's helpers; started now, while the logs
    # are opened, when the recipe says they are of a kind that wants them (else, if they do,
    # by the reader as it opens them)
    early = source is None and not producer.sharded and helped_layout(recipe)
    # a sharded build's key needs the logs' digests as soon as the planning ends: taken beside it
    paths = log_paths(recipe)
    with spare.scope(paths, early=early), EarlyDigests(paths if producer.sharded else ()) as digests:
        return _run_build(recipe, producer, source, rows_per_chunk, progress, replace, digests)


def log_paths(recipe) -> list:
    """The log files and folders a recipe names (a build's spare helper is sized by them)."""
    return [p for label, p in recipe.inputs()
            if label.startswith(("[logs] path", "[[sources]]")) and not label.endswith("layout")]


def helped_layout(recipe) -> bool:
    """True when the recipe's one log is a folder or its layout file says grouped or per-file
    (the readers whose planning and reading run in helper processes)."""
    if recipe.sources is not None or recipe.logs_path is None:
        return False
    if Path(recipe.logs_path).is_dir():
        return True
    doc = small_toml(recipe.layout_path) if recipe.layout_path is not None else None
    return doc is not None and doc.get("shape") in ("grouped", "per-file")


def _run_build(recipe, producer, source, rows_per_chunk, progress, replace, digests) -> BuildResult:
    launch = getattr(producer, "launch", None)
    try:
        if launch is not None:   # worker processes start on the other cores while this one plans
            launch()
        plan, source = make_plan(recipe, source)
        cut = getattr(producer, "plan_chunks", None)
        per_chunk = chunk_transitions(plan, rows_per_chunk or producer.rows_per_chunk)
        chunks = plan_shards(plan, per_chunk) if cut is None else cut(plan, source, per_chunk)
    except BaseException:
        if launch is not None:
            producer.abandon()
        raise
    summary = SummaryBuilder(strategy_names(recipe.mixture), plan.total_rows, recipe.seed,
                             distance_unit=recipe.reward.reach_threshold,
                             rule=recipe.reward)

    def count(rows):
        for split, cols in rows.columns.items():
            summary.add(split, cols, rows.keys[split])

    out = recipe.output
    # the inputs (file checksums) are read on their own thread, alongside the build
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-inputs") as side:
        inputs = side.submit(lambda: read_inputs(plan, source, log_files=digests.log_files(source),
                                                 with_library=producer.sharded))
        try:
            producer.open(plan, source, chunks, inputs)
            with SetWriter(out.path, plan.columns, chunk_rows=out.chunk_rows, compression=out.compression,
                           total_rows=split_rows(plan), replace=replace) as writer:
                for spec, rows in producer.rows(count):
                    for split, cols in rows.columns.items():
                        writer.add(split, cols, rows.keys[split])
                    writer.flush()
                    if progress is not None:
                        progress(spec.transitions, plan.total_transitions)
                producer.finish()
                path, result = close_dataset(writer, plan, source, summary, inputs=inputs.result())
        except BaseException as exc:
            producer.abandon()
            failed = producer.write_failure(exc)
            if failed is None:
                raise
        else:
            failed = None
    if failed is not None:  # raised outside the handler: one line, no chained traceback
        raise OutputWriteError(failed, file=out.path, advice=producer.resume_advice)
    producer.cleanup()
    reuse = producer.reuse_info() if hasattr(producer, "reuse_info") else None
    return BuildResult(path=path, summary=result, shards=producer.info(), reuse=reuse)


def check_outputs(recipe, *, sharded: bool = False, replace: bool = False, source=None, card: bool = False,
                  keep_work: bool = False) -> None:
    """Refuse, before any work, a build that would write over one of its inputs or an existing output.

    The inputs are the recipe's (:meth:`Recipe.inputs`: recipe file, logs with every file of a
    log folder, layout, embedding, goal library) and an opened ``source``'s files; the outputs
    are the dataset, with ``card`` its card and plot, for a sharded build its build folder
    ``.NAME.shards``, and with ``keep_work`` its work folder ``.NAME.work``.

    Raises
    ------
    OutputError
        One line naming the output and the input, or saying how to replace an existing output.
    """
    out = recipe.output.path
    inputs = list(recipe.inputs()) + [("log file", f) for f in getattr(source, "files", None) or []]
    outputs = [("output", out)] + ([("build folder", folder_of(out))] if sharded else [])
    outputs += [("work folder", work_folder_of(out))] if keep_work else []
    if card:
        outputs += list(zip(("dataset card", "card plot"), card_paths(out))) + [("card plot", graph_plot_path(out))]
    check_no_overlap(inputs, outputs)
    refuse_existing(out, replace=replace, ours=is_goal_set, what="dataset")
    if card:
        check_card_outputs(out, replace=replace)


def close_dataset(writer, plan, source, summary, log_files=None, inputs: BuildInputs | None = None):
    """Finish a build's file: summary, provenance and attributes, then the writer's rename.

    Returns
    -------
    (Path, dict)
        The dataset path and its summary.
    """
    recipe, out = plan.recipe, plan.recipe.output
    result = final_summary(summary, plan, source)
    prov = provenance(plan, source, log_files=log_files, inputs=inputs)
    # each file's path relative to the folder the recipe writes the set to (not --out: the
    # bytes stay the same wherever the set is written), so a set moved with its files finds them
    folder = declared_folder(recipe.file if recipe.file != "<recipe>" else None, recipe.text)
    if folder is not None:
        prov = with_relative(prov, folder)
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
    result["composition"].update(widths=dict(plan.shapes or {}), sources=source_counts(plan, source))
    if plan.dtypes is not None:   # the stored dtypes (the recipe's [output] / [goal] dtypes, else the logs')
        result["composition"]["dtypes"] = plan.dtypes.describe()
    skipped = list(getattr(source, "skipped", []))
    result["skipped_episodes"] = len(skipped)
    if plan.recipe.sources is not None:
        result["sources"] = sources_summary(plan, source)
    if skipped:
        result["warnings"].append(f"{len(skipped)} episode(s) of the logs failed validation and were skipped "
                                  f"(first: episode {skipped[0][0]}); the provenance lists them")
    return result


def source_counts(plan, source) -> list:
    """Kept episodes and transitions per log file, per split (for the dataset card).

    Readers that know which file holds each episode say so; a single-file log holds them all.
    Returns ``[{"path", "episodes": {split: n}, "transitions": {split: n}}]`` in the order of the
    source's files (files that hold no kept episode are listed with zeros), or one entry with
    path "" when the reader cannot tell.
    """
    given = [str(f) for f in getattr(source, "files", None) or []]
    files = [os.path.realpath(f) for f in given]     # Path.resolve's result, at half its cost
    file_of = getattr(source, "_file_of", None)
    if len(files) == 1:
        where = np.zeros(len(plan.episode_ids), np.int64)
    elif file_of is not None and files:
        index = {f: i for i, f in enumerate(files)}
        named = {f: i for i, f in enumerate(given)}       # the reader's own names: no resolving

        def position(path) -> int:
            found = named.get(str(path))
            return found if found is not None else index.get(os.path.realpath(path), -1)

        try:
            where = np.array([position(file_of(int(e))) for e in plan.episode_ids], dtype=np.int64)
        except Exception:  # a reader that cannot tell  # noqa: BLE001
            where = None
        if where is not None and (where < 0).any():
            where = None
    else:
        where = None
    if where is None:
        files, where = [""], np.zeros(len(plan.episode_ids), np.int64)
    episodes, transitions = {}, {}
    for c, s in enumerate(SPLITS):
        mine = plan.splits == c
        episodes[s] = np.bincount(where[mine], minlength=len(files))
        transitions[s] = np.bincount(where[mine], weights=plan.lengths[mine], minlength=len(files))
    return [{"path": f, "episodes": {s: int(episodes[s][i]) for s in SPLITS},
             "transitions": {s: int(transitions[s][i]) for s in SPLITS}} for i, f in enumerate(files)]
