"""Every chunk of the logs read once, half by this process and half by the spare helper at once.

A recipe with goal heads, neighbour goals or a ``[graph]`` table needs phi of every state of
the logs before it relabels (the goal table, :func:`goalkit.pipeline.plan.goal_table`): one
whole read of the logs, serial in the coordinator, before anything else can run. With a second
CPU, :func:`shared_chunks` has the build's spare helper (:mod:`goalkit.logs.spare`; the same
``source.read`` on a pickled copy of the opened logs, as the chunk reader of
:mod:`goalkit.pipeline.readproc`) read the last part of the chunks while this process reads the
first part; the two take turns handing over, so both read at the same time.

The result never depends on the helper. A chunk it could not read (any error, a helper that
fails to start or dies) is read here afterwards, and whatever the caller does with a chunk
that raises is raised in chunk order: a problem in the first part at once (those chunks come
first), a problem in the last part only once every chunk before it has been done, the lowest
first. So the error a user sees is the one the serial read gives.
"""

from __future__ import annotations

from collections import deque

from goalkit.logs import spare
from goalkit.pipeline import readproc

#: Chunks asked of the helper ahead of the one being handed over.
AHEAD = 2


def shared_chunks(source, bounds, use):
    """Call ``use(index, chunk)`` for every chunk ``(start, stop)`` of ``bounds`` of ``source``.

    Chunks ``0 .. k - 1`` are read here in order and the others by the spare helper, when
    :func:`goalkit.pipeline.readproc.wanted_ranges` says a helper is worth it; ``use`` may run
    for those out of order, interleaved with the first part. An exception ``use`` raises for a
    chunk of the last part is held and raised, in chunk order, after the first part is done.

    Parameters
    ----------
    source : LogSource
    bounds : list of (int, int)
        Episode ranges of the chunks.
    use : callable
        ``use(index, EpisodeSet)``; whatever it raises is raised as the serial loop would.
    """
    bounds = [(int(a), int(b)) for a, b in bounds]
    helper = _helper(source, bounds)
    if helper is None:
        for k, (a, b) in enumerate(bounds):
            use(k, source.read(a, b))
        return
    k = (len(bounds) + 1) // 2                       # the helper is warm: an even share
    theirs = list(range(k, len(bounds)))
    queue, pending = list(theirs), deque()            # not yet asked; asked, not yet received
    later, held = [], {}                              # chunks read here afterwards; use()'s errors

    # A helper process gets one request for all its chunks: a request carries the pickled logs'
    # index, more than a pipe holds, and a second one written while the helper writes an answer
    # nobody reads yet would block both. It reads them one after the other, each answer waiting
    # in its pipe until taken, so at most a chunk waits in memory. A pool stand-in keeps every
    # answer of a request until it is taken: it gets one request per chunk, at most AHEAD ahead.
    whole = getattr(helper, "proc", None) is not None

    def ask() -> None:
        while queue and (whole or len(pending) < AHEAD):
            js = queue[:] if whole else queue[:1]
            del queue[:len(js)]
            if helper.alive and helper.send({"call": source.read, "each": [bounds[j] for j in js]}):
                pending.extend(js)
            else:
                later.extend(js)

    clean = False
    try:
        ask()
        for i in range(k):
            use(i, source.read(*bounds[i]))           # a problem here comes first in chunk order
            if pending:
                _take(helper, pending.popleft(), use, later, held)
                ask()
        while pending:
            _take(helper, pending.popleft(), use, later, held)
            ask()
        clean = helper.alive
    finally:
        if clean:
            spare.give_back(helper)
        else:
            helper.close()
    for j in theirs:                                  # in chunk order, as the serial loop
        if j in held:
            raise held[j]
        if j in later:
            use(j, source.read(*bounds[j]))


def _take(helper, j, use, later, held) -> None:
    """Receive the helper's next chunk (number ``j``) and use it; a failed one is left for later."""
    chunk = helper.receive() if helper.alive else None
    if chunk is None:
        later.append(j)
        return
    try:
        use(j, chunk)
    except Exception as exc:                          # noqa: BLE001  raised in chunk order, later
        held[j] = exc


def _helper(source, bounds):
    """The build's spare helper for this read, or None (one CPU, small logs, none can start)."""
    if not readproc.wanted_ranges(source, bounds):       # (it wants several chunks)
        return None
    helper = spare.take()
    return helper if helper is not None and helper.alive else None
