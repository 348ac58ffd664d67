"""Fit embeddings on opened task logs, and open embedding files as goal maps for a log.

The log is read a chunk of episodes at a time; only the embedding's input features are
kept (the chosen observation columns, or the preprocessed frames), then the embedding is
fitted once on them with the episodes' state offsets, so SFA differences stay inside
episodes and the result does not depend on the chunk size.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np

from goalkit.errors import EmbeddingError
from goalkit.goals.base import Embedding
from goalkit.goals.embedmap import EmbeddingGoalMap
from goalkit.goals.frames import FrameEmbedding, check_frames, downsample, _check_block
from goalkit.goals.goalmap import goal_map_from_fields
from goalkit.goals.precomputed import Precomputed
from goalkit.logs.episodes import chunk_bounds

#: transitions read per chunk by default
CHUNK_STEPS = 200_000


def state_offsets_of(lengths: np.ndarray) -> np.ndarray:
    """State row offsets (``T + 1`` states per episode) of a log with these lengths."""
    return np.concatenate([[0], np.cumsum(np.asarray(lengths, dtype=np.int64) + 1)]).astype(np.int64)


def columns_for(source, fields: Sequence[str] = (), indices: Sequence[int] | None = None):
    """Return ``(indices, fields)`` of the observation columns an embedding reads.

    ``fields`` (names of the layout's ``[fields]``) win over ``indices``; with neither, every
    column is read (``indices`` None).
    """
    if fields:
        gm = goal_map_from_fields(list(fields), source.fields)
        return gm.indices, tuple(fields)
    return (None if indices is None else tuple(int(i) for i in indices)), ()


def read_features(source, input: str = "observation", indices=None, block=2,
                  chunk_steps: int = CHUNK_STEPS, advance: Callable[[int], object] | None = None):
    """Read the embedding input of every logged state, a chunk of episodes at a time.

    Parameters
    ----------
    source : LogSource
        The opened logs.
    input : {"observation", "frame"}
    indices : tuple of int or None
        Observation columns (``None``: all).
    block : int or (int, int)
        Frame block size (``input="frame"``).
    chunk_steps : int
        Transitions per read.
    advance : callable, optional
        Called with the transitions of each chunk read (a progress bar's ``update``).

    Returns
    -------
    features : ndarray of float64 (S, D)
    offsets : ndarray of int64 (E + 1,)
        State row offsets of the episodes in ``features``.
    frame_shape : tuple or None
    """
    parts, frame_shape = [], None
    blk = _check_block(block) if input == "frame" else None
    for start, stop in chunk_bounds(source.lengths, chunk_steps):
        es = source.read(start, stop)
        if input == "frame":
            if es.frames is None:
                raise EmbeddingError("expected camera frames for --input frame; the layout names no frame key",
                                     file=source.path, key="frame")
            f = check_frames(es.frames, shape=frame_shape)
            frame_shape = tuple(f.shape[1:])
            parts.append(downsample(f, blk))
        else:
            obs = es.observations
            if indices is not None:
                if max(indices, default=-1) >= obs.shape[1]:
                    raise EmbeddingError(f"expected observation columns below {obs.shape[1]}, got {max(indices)}",
                                         file=source.path, key="observation")
                obs = obs[:, np.asarray(indices, dtype=np.int64)]
            parts.append(np.asarray(obs, dtype=np.float64))
        if advance is not None:
            advance(int(es.num_transitions))
    if not parts:
        raise EmbeddingError("expected at least one episode in the logs, found none", file=source.path)
    return np.concatenate(parts), state_offsets_of(source.lengths), frame_shape


def fit_on_logs(source, embedding: Embedding, input: str = "observation", fields: Sequence[str] = (),
                indices=None, block=2, chunk_steps: int = CHUNK_STEPS, advance=None) -> EmbeddingGoalMap:
    """Fit ``embedding`` on the logs and return it wrapped as a goal map.

    Parameters
    ----------
    source : LogSource
    embedding : Embedding
        Unfitted Raw, Standardised, PCA or SFA.
    input : {"observation", "frame"}
        ``"frame"`` wraps the embedding in a :class:`FrameEmbedding` with ``block``.
    fields, indices : optional
        Observation columns (see :func:`columns_for`); not with frames.
    """
    if input not in ("observation", "frame"):
        raise EmbeddingError(f"expected input 'observation' or 'frame', got {input!r}", key="input")
    if input == "frame" and (fields or indices is not None):
        raise EmbeddingError("expected no observation fields or indices with frame input", key="fields")
    idx, names = columns_for(source, fields, indices) if input == "observation" else (None, ())
    X, offsets, frame_shape = read_features(source, input, idx, block, chunk_steps, advance)
    if input == "frame":
        emb = FrameEmbedding(embedding, block=block).fit_preprocessed(X, offsets, frame_shape)
    else:
        emb = embedding.fit(X, offsets)
    return EmbeddingGoalMap(emb, input=input, indices=idx, fields=names)


def precomputed_on_logs(source, values, *, file=None) -> EmbeddingGoalMap:
    """Wrap an array aligned with the log's states (``T + 1`` rows per episode) as a goal map.

    Raises
    ------
    EmbeddingError
        The array's rows do not match the log's states.
    """
    arr = np.asarray(values)
    offsets = state_offsets_of(source.lengths)
    if not np.array_equal(np.asarray(source.episode_ids), np.arange(len(source.lengths))):
        raise EmbeddingError("expected every episode of the log kept (precomputed arrays align with all "
                             "logged states)", file=source.path)
    if arr.ndim != 2 or arr.shape[0] != offsets[-1]:
        raise EmbeddingError(f"expected an array of shape ({int(offsets[-1])}, G): one row per logged state "
                             f"(episode length + 1 per episode), got {arr.shape}", file=file)
    try:
        emb = Precomputed().fit(arr, offsets)
    except EmbeddingError as exc:
        if exc.file is None:
            exc.file = None if file is None else str(file)
            exc.args = (exc.render(),)
        raise
    return EmbeddingGoalMap(emb)


def embedding_goal_map(path, source, file=None) -> EmbeddingGoalMap:
    """Open an embedding file as the goal map of an opened log, checking that they fit.

    Parameters
    ----------
    path : str or Path
        Embedding file (``goalkit embed`` output).
    source : LogSource
        The logs the goal map will read.
    file : str, optional
        The recipe naming the embedding (unused in messages about the embedding file itself).

    Raises
    ------
    EmbeddingError
        Unreadable file, or it does not fit the logs: missing fields, too few observation
        columns, no frames, or a precomputed array made for other episodes.
    """
    gm = EmbeddingGoalMap.load(path)
    if gm.input == "observation":
        if gm.fields:
            missing = [f for f in gm.fields if f not in source.fields]
            if missing:
                raise EmbeddingError(f"expected observation field '{missing[0]}' in the logs (the embedding was "
                                     f"fitted on fields {', '.join(gm.fields)}); fields are: "
                                     f"{', '.join(source.fields) or '(none)'}", file=path, key="goal_map")
            idx, _ = columns_for(source, gm.fields)
            if len(idx) != gm.embedding.n_features_in_:
                raise EmbeddingError(f"expected fields {', '.join(gm.fields)} to have {gm.embedding.n_features_in_} "
                                     f"columns as when fitted, the logs have {len(idx)}", file=path, key="goal_map")
            gm = EmbeddingGoalMap(gm.embedding, indices=idx, fields=gm.fields, file=path)
        width = getattr(source, "obs_width", None)
        need = gm.embedding.n_features_in_ if gm.indices is None else max(gm.indices) + 1
        if width and ((gm.indices is None and width != need) or width < need):
            raise EmbeddingError(f"expected observations with {need} columns for the embedding, the logs have "
                                 f"{width}", file=path, key="goal_map")
    elif gm.input == "frame":
        layout = getattr(source, "layout", None)
        if layout is not None and layout.keys.frame is None:
            raise EmbeddingError("expected camera frames in the logs for a frame embedding; the layout names no "
                                 "frame key", file=path, key="goal_map")
    else:
        gm.embedding.check_lengths(source.episode_ids, source.lengths, file=path)
    return gm
