"""The coordinator of a scaled-out build: shards out, one dataset in.

1. Plan as the single-process build does (open the logs, check the recipe, split, goal table).
2. Cut the kept episodes into shards; compute the build key; open (or resume) the build folder.
3. Reuse every shard file already there that belongs to this key and matches its checksum;
   submit the others to a runner (local processes or Dask).
4. As shards finish, feed their rows to :class:`~goalkit.write.writer.SetWriter` and the summary
   strictly in shard order. The writer's output does not depend on how rows were chunked, so the
   file is byte-identical to the single-process build's.
5. Close the writer (temporary name, rename) and delete the build folder.

A failure stops the build with one line naming the shard and its episodes; finished shards stay
for the next run.
"""

from __future__ import annotations

import gc
import os

from goalkit.errors import DatasetError, GoalkitError
from goalkit.pipeline.buildfolder import BuildFolder, build_key
from goalkit.pipeline.plan import make_plan, split_rows, strategy_names
from goalkit.pipeline.shards import ShardError, check_shard, plan_shards, read_shard
from goalkit.pipeline.summary import SummaryBuilder
from goalkit.write.provenance import describe_files
from goalkit.write.writer import OutputWriteError, SetWriter, os_reason


def shard_error(spec, err: dict, folder) -> GoalkitError:
    """The one-line error for a failed shard task (``err`` from :func:`workers.failure`)."""
    where = spec.describe()
    if err.get("goalkit"):
        parts = [str(err[k]) if k == "file" else f"{k} {err[k]}"
                 for k in ("file", "key", "episode", "step") if err.get(k) is not None]
        return ShardError(f"{where}: " + ": ".join(parts + [err["message"]]))
    if err.get("os_error"):
        reason = os.strerror(err["errno"]) if err.get("errno") else os_reason(OSError(err["message"]))
        return ShardError(f"{where}: cannot write its shard file ({reason}); the finished shards are kept "
                          f"and the same command resumes", file=folder)
    if err.get("type") == "WorkerLost":
        return ShardError(f"{where}: {err['message']}; the finished shards are kept and the same command resumes")
    return ShardError(f"{where}: the worker failed: {err['type']}: {err['message']}")


def _layout_text(recipe) -> str:
    if recipe.layout_path is None:
        return ""
    from pathlib import Path

    return Path(recipe.layout_path).read_text(encoding="utf-8")


def build_sharded(recipe, runner, *, source=None, rows_per_shard: int | None = None, progress=None,
                  fresh: bool = False, replace: bool = False):
    """Build the dataset a recipe describes with shard tasks run by ``runner``.

    Parameters
    ----------
    recipe : Recipe
    runner : LocalRunner or DaskRunner
        Runs :func:`goalkit.pipeline.workers.run_shard`; closed here.
    source : LogSource, optional
        Already opened logs.
    rows_per_shard : int, optional
        Output rows per shard (about; default :data:`goalkit.pipeline.build.SHARD_ROWS`); only
        speed, memory and resume granularity depend on it.
    progress : callable, optional
        ``progress(transitions, total_transitions)`` as shards are assembled (reused ones too).
    fresh : bool
        Discard the shards of an interrupted run instead of resuming.
    replace : bool
        Replace an existing goalkit set at the output path.

    Returns
    -------
    BuildResult
        With ``shards = {"total", "reused", "computed", "runner"}``.

    Raises
    ------
    GoalkitError
        ShardError naming the shard and episodes when a task fails; DatasetError when the build
        folder or the output cannot be written.
    """
    from goalkit.pipeline.build import SHARD_ROWS, BuildResult, chunk_transitions, close_dataset
    from goalkit.pipeline.workers import make_payload

    plan, source = make_plan(recipe, source)
    specs = plan_shards(plan, chunk_transitions(plan, rows_per_shard or SHARD_ROWS))
    log_files = describe_files(list(source.files))
    emb = describe_files([recipe.goal.embedding]) if recipe.goal.embedding is not None else []
    if getattr(recipe.mixture, "library", None) is not None:  # a changed library invalidates shards
        emb = emb + describe_files([recipe.mixture.library])
    key, record = build_key(recipe, _layout_text(recipe), log_files, emb, specs)
    folder = BuildFolder(recipe.output.path)
    columns = list(plan.columns)
    try:
        resumed = folder.open(key, record, fresh=fresh)
        ready = {s.index for s in specs if resumed and check_shard(folder.path, s, key, columns)}
        pending = [s for s in specs if s.index not in ready]
        reused = len(ready)
        gpt = recipe.mixture.goals_per_transition
        summary = SummaryBuilder(strategy_names(recipe.mixture), plan.total_transitions * gpt, recipe.seed)
        out = recipe.output
        with SetWriter(out.path, plan.columns, chunk_rows=out.chunk_rows, compression=out.compression,
                       total_rows=split_rows(plan), replace=replace) as writer:
            cursor = 0

            def assemble():
                nonlocal cursor
                while cursor < len(specs) and specs[cursor].index in ready:
                    spec = specs[cursor]
                    rows = read_shard(folder.path, spec, key, columns)
                    for split, cols in rows.columns.items():
                        writer.add(split, cols, rows.keys[split])
                        summary.add(split, cols, rows.keys[split])
                    writer.flush()
                    if progress is not None:
                        progress(spec.transitions, plan.total_transitions)
                    cursor += 1

            assemble()
            if pending:
                try:
                    runner.start(make_payload(plan, source, folder.path), folder.path)
                except OSError as exc:
                    raise DatasetError(f"cannot write the build folder ({os_reason(exc)})",
                                       file=folder.path) from None
                by_index = {s.index: s for s in pending}
                for outcome in runner.run(pending, folder.path, key):
                    if not outcome["ok"]:
                        raise shard_error(by_index[outcome["index"]], outcome["error"], folder.path)
                    ready.add(outcome["index"])
                    assemble()
            runner.close()
            path, result = close_dataset(writer, plan, source, summary, log_files=log_files)
    except BaseException as exc:
        runner.close()
        folder.release()
        if isinstance(exc, OutputWriteError):
            failed = exc.reason  # the output could not be written (disk full, no permission)
        else:
            os_error = _os_error_in(exc)
            if os_error is None:
                raise
            failed = os_reason(os_error)
    else:
        failed = None
    if failed is not None:
        # raised outside the handler, so no traceback keeps the failed HDF5 objects alive
        gc.collect()
        raise OutputWriteError(failed, file=recipe.output.path,
                               advice="the finished shards are kept and the same command resumes")
    folder.remove()
    info = {"total": len(specs), "reused": reused, "computed": len(specs) - reused,
            "runner": runner.description}
    return BuildResult(path=path, summary=result, shards=info)


def _os_error_in(exc: BaseException):
    """The OSError behind ``exc``: itself, or one it was raised while handling (HDF5 often fails
    again while closing a file whose write failed). None for other errors."""
    seen = 0
    while exc is not None and seen < 10:
        if isinstance(exc, OSError):
            return exc
        if isinstance(exc, GoalkitError):
            return None
        exc = exc.__cause__ or exc.__context__
        seen += 1
    return None


