"""The sharded producer of a build's chunk rows: shard files computed by a runner.

Used by the engine (:mod:`goalkit.pipeline.build`) with a runner of local worker processes
(:class:`~goalkit.pipeline.workers.LocalRunner`) or of a Dask cluster
(:class:`~goalkit.pipeline.dask_build.DaskRunner`):

1. The engine's chunks are the shards; the build key is the SHA-256 of the build's inputs
   (:class:`~goalkit.pipeline.build.BuildInputs`, read once) and the shard partition. Open (or
   resume) the build folder with it.
2. Reuse every shard file already there that belongs to this key and matches its checksum;
   submit the others to the runner.
3. As shards finish, hand their rows back strictly in shard order; the engine writes and counts
   them exactly as it does the in-process producer's rows.
4. After the dataset is written, delete the build folder.

A failure stops the build with one line naming the shard and its episodes; finished shards stay
for the next run.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor

from goalkit.errors import DatasetError, GoalkitError
from goalkit.logs import held, spare
from goalkit.pipeline import poolspare
from goalkit.pipeline.buildfolder import BuildFolder, build_key
from goalkit.pipeline.shardfiles import ReadBuffers, ShardError, check_shard, plan_shards, read_shard
from goalkit.pipeline.workers import HOST, make_payload
from goalkit.write.writer import OutputWriteError, os_reason

#: Default output rows per shard of a sharded build (each shard is a task and a file).
SHARD_ROWS = 131_072


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


class ShardProducer:
    """Compute the chunks as resumable shard files with ``runner``; hand their rows back in order.

    Parameters
    ----------
    runner : LocalRunner or DaskRunner
        Runs :func:`goalkit.pipeline.workers.run_shard`; closed by :meth:`finish` or :meth:`abandon`.
    fresh : bool
        Discard the shards of an interrupted run instead of resuming.
    """

    sharded = True
    rows_per_chunk = SHARD_ROWS
    #: Added to the one-line error when the output cannot be written.
    resume_advice = "the finished shards are kept and the same command resumes"

    def __init__(self, runner, fresh: bool = False):
        self.runner = runner
        self.fresh = fresh
        self.folder = None
        self.reused = 0
        self.chunks = []
        self.work = []
        self.written = {}      # shard index -> (sha256, bytes) its worker reported in this run
        self.holds = False     # this process holds its logs open for the build's planning
        self.closer = None     # the thread closing them
        self.buffers = None    # the shard files' read buffers (ReadBuffers) while rows() runs

    def launch(self) -> None:
        """Start the runner's workers before the build plans (when the runner can).

        A runner whose workers are up (``runner.ready()``) also stands in for the logs' spare
        helper process while the build plans (:class:`~goalkit.pipeline.poolspare.PoolSpare`):
        the planning helper's part of the episodes runs on a worker, and no third interpreter
        is started.

        This process also holds its logs open while it plans (:mod:`goalkit.logs.held`): the
        planning scan and the reads after it share one open file, closed on a side thread once
        the shards are submitted (see :meth:`rows`).
        """
        if not held.holding():
            held.hold_logs(True)
            self.holds = True
        launch = getattr(self.runner, "launch", None)
        if launch is not None:
            launch()
        ready = getattr(self.runner, "ready", None)
        if poolspare.wanted() and ready is not None and ready():
            spare.give_back(poolspare.PoolSpare(self.runner))   # kept only inside a build's scope

    def plan_chunks(self, plan, source, transitions_per_chunk: int) -> list:
        """The shard partition: :func:`~goalkit.pipeline.shardfiles.plan_shards`, tapered at the end."""
        return plan_shards(plan, transitions_per_chunk, taper=True)

    def open(self, plan, source, chunks, inputs) -> None:
        """Compute the build key from ``inputs`` (a future of :class:`BuildInputs`), open the folder.

        Raises
        ------
        DatasetError
            When the build folder cannot be created or written, or another build holds it.
        """
        self.plan, self.source, self.chunks = plan, source, chunks
        self.columns = list(plan.columns)
        self.key, record = build_key(inputs.result().key_record(), chunks)
        self.folder = BuildFolder(plan.recipe.output.path)
        resumed = self.folder.open(self.key, record, fresh=self.fresh)
        self.ready = {s.index for s in chunks
                      if resumed and check_shard(self.folder.path, s, self.key, self.columns)}
        self.reused = len(self.ready)

    def rows(self, count):
        """Yield ``(spec, ChunkRows)`` for each shard, in order (reused ones first as far as they go).

        ``count(rows)`` is called on each shard's rows, in order, before they are yielded. While
        the engine writes one shard's rows, the next shard, when its file is ready, is read and
        checked on a side thread.

        Raises
        ------
        ShardError
            Naming the shard and its episodes when a task fails.
        """
        folder = self.folder.path
        pending = [s for s in self.chunks if s.index not in self.ready]
        self.cursor = 0
        self._let_go(wait=False)     # planned and written no more: the logs close while the shards run
        self.buffers = ReadBuffers()   # shard files are read into buffers used again (no page faults)
        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-shard-read") as reader:
            self.reader, self.ahead = reader, {}
            try:
                yield from self._assembled(count)
                if not pending:
                    return
                try:
                    self.runner.start(make_payload(self.plan, self.source, folder), folder)
                except OSError as exc:
                    raise DatasetError(f"cannot write the build folder ({os_reason(exc)})", file=folder) from None
                by_index = {s.index: s for s in pending}
                for outcome in self.runner.run(pending, folder, self.key):
                    if not outcome["ok"]:
                        raise shard_error(by_index[outcome["index"]], outcome["error"], folder)
                    self.ready.add(outcome["index"])
                    if outcome.get("host") == HOST and outcome.get("sha256") and outcome.get("bytes"):
                        self.written[outcome["index"]] = (outcome["sha256"], outcome["bytes"])
                    self.work.append((outcome.get("seconds", 0.0), outcome.get("cpu_seconds", 0.0)))
                    release = getattr(self.runner, "release", None)
                    if release is not None and len(self.ready) == len(self.chunks):
                        release()     # nothing left to compute: the workers exit while we write
                    yield from self._assembled(count)
            finally:
                for fut in self.ahead.values():
                    fut.cancel()
                self.reader, self.ahead, self.buffers = None, {}, None

    def _read(self, spec):
        # a shard its worker wrote in this run, on this host: its digest and size as reported
        # (the bytes are not hashed twice); a reused one: its whole SHA-256 is checked
        return read_shard(self.folder.path, spec, self.key, self.columns, defer=True,
                          written=self.written.get(spec.index), buffers=self.buffers)

    def _assembled(self, count):
        """The next shards in order whose files are ready (the one after, if ready, read meanwhile)."""
        specs = self.chunks
        while self.cursor < len(specs) and specs[self.cursor].index in self.ready:
            spec = specs[self.cursor]
            ahead = self.ahead.pop(spec.index, None)
            rows = self._read(spec) if ahead is None else ahead.result()
            following = specs[self.cursor + 1] if self.cursor + 1 < len(specs) else None
            if following is not None and following.index in self.ready:
                self.ahead[following.index] = self.reader.submit(self._read, following)
            count(rows)
            self.cursor += 1
            yield spec, rows

    def _let_go(self, wait: bool) -> None:
        """Stop holding the logs this producer asked this process to hold; with ``wait``, until closed."""
        if self.holds:
            self.holds = False
            self.closer = held.let_go_soon()
        if wait and self.closer is not None:
            self.closer.join()
            self.closer = None

    def finish(self) -> None:
        """Stop the runner (every shard has been read back)."""
        self._let_go(wait=True)
        self.runner.close()

    def abandon(self) -> None:
        """After a failure: stop the runner, release the folder; its finished shards stay."""
        self._let_go(wait=True)
        self.runner.close()
        if self.folder is not None:
            self.folder.release()

    def write_failure(self, exc: BaseException):
        """The reason text when ``exc`` is a failed write of the output or of the build folder, else None."""
        if isinstance(exc, OutputWriteError):
            return exc.reason  # the output could not be written (disk full, no permission)
        os_error = _os_error_in(exc)
        return None if os_error is None else os_reason(os_error)

    def cleanup(self) -> None:
        """After the dataset is written: delete the build folder."""
        self.folder.remove()

    def info(self) -> dict:
        """``{"total", "reused", "computed", "runner", "task_seconds", "task_cpu_seconds"}``.

        The last two sum the computed shards' tasks: wall seconds, and CPU seconds of the threads
        that ran them (how busy the workers were; not stored in the set).
        """
        return {"total": len(self.chunks), "reused": self.reused, "computed": len(self.chunks) - self.reused,
                "runner": self.runner.description, "task_seconds": sum(w for w, _ in self.work),
                "task_cpu_seconds": sum(c for _, c in self.work)}


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
