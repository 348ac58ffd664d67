"""The in-process producer of a build's chunk rows: two helper threads in this process.

Chunk ``k + 1`` is read from the logs (one thread) while chunk ``k`` is relabelled (another) and
the engine writes chunk ``k - 1``; numpy, hashing and HDF5 I/O release the GIL for much of that
work. Each chunk's rows are counted into the summary on the relabelling thread, in chunk order.
With a second CPU and enough chunks, the chunks are read by a reader process instead
(:mod:`goalkit.pipeline.readproc`), so that reading does not take turns with relabelling and
writing for the GIL. Only the timing changes, never the rows (see :mod:`goalkit.pipeline.build`).
"""

from __future__ import annotations

from collections import deque
from concurrent.futures import ThreadPoolExecutor

from goalkit.pipeline.chunk import relabel_chunk
from goalkit.pipeline.readproc import ChunkReader
from goalkit.pipeline.readproc import wanted as readproc_wanted

#: Default output rows per chunk of a build in one process (bounds the build's memory).
CHUNK_ROWS = 65_536
#: Chunks relabelled ahead of the one being written.
LOOKAHEAD = 2


class InProcessProducer:
    """Relabel the chunks in this process, on a read thread and a relabel thread.

    The observation and action columns come as deferred gathers, for
    :class:`~goalkit.write.writer.SetWriter` to copy straight into its blocks (see
    :func:`~goalkit.pipeline.chunk.relabel_chunk`).
    """

    sharded = False
    rows_per_chunk = CHUNK_ROWS
    resume_advice = None

    def __init__(self):
        self.plan = self.source = self.chunks = None

    def open(self, plan, source, chunks, inputs) -> None:
        """Take the plan, the opened logs and the ordered chunks (``inputs`` unused)."""
        self.plan, self.source, self.chunks = plan, source, chunks

    def rows(self, count):
        """Yield ``(spec, ChunkRows)`` for each chunk, in order; ``count(rows)`` runs on the relabel thread."""
        plan, source = self.plan, self.source

        def task(read):
            rows = relabel_chunk(plan, read.result(), defer_gathers=True)
            count(rows)
            return rows

        chunk_reader = ChunkReader(source, [(s.start, s.stop) for s in self.chunks]) \
            if readproc_wanted(source, self.chunks) else None
        read_chunk = source.read if chunk_reader is None else chunk_reader.read
        try:
            with ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-read") as reader, \
                    ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-chunk") as pool:
                pending: deque = deque()
                for spec in self.chunks:
                    read = reader.submit(read_chunk, spec.start, spec.stop)
                    pending.append((spec, pool.submit(task, read)))
                    if len(pending) > LOOKAHEAD:
                        done, job = pending.popleft()
                        yield done, job.result()
                while pending:
                    done, job = pending.popleft()
                    yield done, job.result()
        finally:
            if chunk_reader is not None:
                chunk_reader.close()

    def finish(self) -> None:
        """Nothing to stop: the threads end with :meth:`rows`."""

    def abandon(self) -> None:
        """Nothing to keep or release after a failed build."""

    def write_failure(self, exc: BaseException):
        """None: a failed write is reported as the writer raised it."""
        return None

    def cleanup(self) -> None:
        """Nothing left behind after a finished build."""

    def info(self):
        """None (only sharded builds report shards)."""
        return None
