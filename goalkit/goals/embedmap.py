"""EmbeddingGoalMap: a fitted embedding used as the goal map phi (the GoalMap protocol)."""

from __future__ import annotations

import hashlib
import json
from typing import Sequence

import numpy as np

from goalkit.errors import EmbeddingError, shown
from goalkit.goals.base import Embedding
from goalkit.goals.embedfile import _flatten, load_embedding_file, save_embedding
from goalkit.logs.episodes import EpisodeSet

INPUTS = ("observation", "frame")


def fingerprint(embedding: Embedding) -> str:
    """Return a SHA-256 hex digest of an embedding's kind, hyperparameters and fitted arrays."""
    h = hashlib.sha256()
    for key, arr in sorted(_flatten(embedding, "").items()):
        a = np.ascontiguousarray(arr)
        h.update(f"{key}|{a.dtype.str}|{a.shape}|".encode())
        h.update(a.tobytes())
    return h.hexdigest()


class EmbeddingGoalMap:
    """Goal map phi(s) = embedding(features of state s).

    Parameters
    ----------
    embedding : Embedding
        A fitted embedding.
    input : {"observation", "frame"}
        What is read from each state: observation columns or the camera frame. A
        precomputed embedding reads neither (it looks states up by episode id and step) and
        accepts the default.
    indices : sequence of int, optional
        Observation columns fed to the embedding, in order (``None``: all columns).
    fields : sequence of str, optional
        Field names the indices came from (provenance only).
    file : str, optional
        The embedding file, for messages and provenance.

    Examples
    --------
    >>> from goalkit.goals.linear import PCA
    >>> obs = np.array([[0., 0., 9.], [1., 1., 9.], [2., 2., 9.]])
    >>> ep = EpisodeSet(observations=obs, actions=np.zeros((2, 1)), offsets=np.array([0, 2]),
    ...                 episode_ids=np.array([0]))
    >>> phi = EmbeddingGoalMap(PCA(1).fit(obs[:, :2]), indices=[0, 1])
    >>> phi.dim, np.round(phi(ep, np.array([0, 2])), 6).tolist()
    (1, [[-1.414214], [1.414214]])
    """

    def __init__(self, embedding: Embedding, input: str = "observation", indices: Sequence[int] | None = None,
                 fields: Sequence[str] = (), file=None):
        if not isinstance(embedding, Embedding):
            raise EmbeddingError(f"expected a goalkit embedding, got {type(embedding).__name__}", file=file)
        if not embedding.is_fitted:
            raise EmbeddingError(f"expected a fitted embedding, the {embedding.kind} embedding is not fitted",
                                 file=file)
        if input not in INPUTS and input != "state":
            raise EmbeddingError(f"expected input 'observation' or 'frame', got {input!r}", file=file, key="input")
        kind = embedding.input_kind
        if kind == "state":
            if input == "frame":
                raise EmbeddingError("expected input 'observation' (ignored) for a precomputed embedding, "
                                     "got 'frame'", file=file, key="input")
            input = "state"
        elif input != kind:
            raise EmbeddingError(f"expected input '{kind}' for this {embedding.kind} embedding "
                                 f"(it was fitted on {'camera frames' if kind == 'frame' else 'observations'}), "
                                 f"got '{input}'", file=file, key="input")
        if indices is not None:
            if input != "observation":
                raise EmbeddingError("expected no observation indices for a frame or precomputed embedding",
                                     file=file, key="indices")
            idx = np.asarray(list(indices))
            if idx.ndim != 1 or (idx.size and not np.issubdtype(idx.dtype, np.integer)) or np.any(idx < 0):
                raise EmbeddingError(f"expected non-negative integer observation indices, got {shown(list(indices))}",
                                     file=file, key="indices")
            if idx.shape[0] != embedding.n_features_in_:
                raise EmbeddingError(f"expected {embedding.n_features_in_} observation indices (the embedding's "
                                     f"input width), got {idx.shape[0]}", file=file, key="indices")
            indices = tuple(int(i) for i in idx)
        self.embedding = embedding
        self.input = input
        self.indices = indices
        self.fields = tuple(fields)
        self.file = None if file is None else str(file)
        self._fingerprint = None

    @property
    def dim(self) -> int:
        """Length of the goal vectors."""
        return int(self.embedding.output_dim_)

    def __call__(self, episodes: EpisodeSet, rows) -> np.ndarray:
        """Return goal vectors, float64 (len(rows), dim), of state rows of ``episodes``."""
        rows = np.asarray(rows, dtype=np.int64).reshape(-1)
        n_states = episodes.observations.shape[0]
        if rows.size and (rows.min() < 0 or rows.max() >= n_states):
            raise EmbeddingError(f"expected state rows in 0..{n_states - 1}, got {int(rows.min())}..{int(rows.max())}",
                                 file=episodes.source or None)
        src = episodes.source or None
        try:
            if self.input == "state":
                so = episodes.state_offsets()
                pos = np.searchsorted(so, rows, side="right") - 1
                used = np.unique(pos)
                self.embedding.check_lengths(episodes.episode_ids[used], episodes.lengths[used], file=self.file)
                return self.embedding.lookup(episodes.episode_ids[pos], rows - so[pos])
            if self.input == "frame":
                if episodes.frames is None:
                    raise EmbeddingError("expected camera frames in the logs for a frame embedding; "
                                         "the layout names no frame key", file=src, key="frame")
                return self.embedding.transform(episodes.frames[rows])
            obs = episodes.observations
            if self.indices is not None:
                if max(self.indices, default=-1) >= obs.shape[1]:
                    raise EmbeddingError(f"expected observations with more than {max(self.indices)} columns for "
                                         f"the embedding's indices, got {obs.shape[1]}", file=src, key="observation")
                x = obs[rows][:, np.asarray(self.indices, dtype=np.int64)]
            else:
                x = obs[rows]
            return self.embedding.transform(x)
        except EmbeddingError as exc:
            if exc.file is None and (self.file or src):
                exc.file = self.file or src
                exc.args = (exc.render(),)
            raise

    def describe(self) -> dict:
        """JSON-able description for provenance: method, hyperparameters, input, dims, fingerprint."""
        if self._fingerprint is None:
            self._fingerprint = fingerprint(self.embedding)
        out = {"kind": "embedding", "method": self.embedding.kind, "params": self.embedding.get_params(),
               "input": self.input, "dim": self.dim, "fingerprint": self._fingerprint,
               "file": self.file}
        if self.embedding._nested:
            out["inner"] = {"method": self.embedding.embedding.kind, "params": self.embedding.embedding.get_params()}
        if self.input == "observation":
            out["indices"] = None if self.indices is None else list(self.indices)
            out["fields"] = list(self.fields)
        return json.loads(json.dumps(out))

    # ---- files ---------------------------------------------------------------------------
    def save(self, path, replace: bool = False):
        """Write the embedding and this map's input settings to an embedding file (atomically).

        An existing file is replaced only with ``replace`` and only if it is a goalkit embedding file.
        """
        return save_embedding(path, self.embedding, {"input": self.input, "fields": list(self.fields),
                                                     "indices": None if self.indices is None else list(self.indices)},
                              replace=replace)

    @classmethod
    def load(cls, path) -> "EmbeddingGoalMap":
        """Read an embedding file written by :meth:`save` or ``goalkit embed``."""
        emb, gm = load_embedding_file(path)
        inp = gm.get("input", emb.input_kind)
        if inp == "state":
            inp = "observation"
        indices, fields = gm.get("indices"), gm.get("fields", [])
        if indices is not None and not isinstance(indices, list):
            raise EmbeddingError(f"expected a list of indices or null, got {indices!r}", file=path, key="goal_map")
        if not isinstance(fields, list) or not all(isinstance(f, str) for f in fields):
            raise EmbeddingError(f"expected a list of field names, got {fields!r}", file=path, key="goal_map")
        return cls(emb, input=inp, indices=indices, fields=fields, file=path)
