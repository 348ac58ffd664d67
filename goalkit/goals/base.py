"""The embedding base class: scikit-learn's estimator discipline, and the registry of kinds.

Hyperparameters are set in ``__init__`` and never changed by ``fit``; ``fit`` learns the
attributes whose names end in ``_``; ``transform`` is pure. Each subclass names its
hyperparameters (``_params``) and the fitted arrays that make up its saved state
(``_arrays``), which is all :mod:`goalkit.goals.embedfile` needs to save and load it.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np

from goalkit.errors import EmbeddingError

#: kind string (as saved in files) -> embedding class
KINDS: dict[str, type["Embedding"]] = {}


def register(cls):
    """Class decorator: make an embedding class loadable by its ``kind``."""
    KINDS[cls.kind] = cls
    return cls


class Embedding:
    """Base class of the embeddings (not used directly).

    Attributes
    ----------
    kind : str
        Name saved in embedding files.
    input_kind : str
        What the embedding reads from a logged state: ``"observation"``, ``"frame"`` or
        ``"state"`` (an array looked up by episode id and step).
    n_features_in_ : int
        Width of the input seen in ``fit``.
    output_dim_ : int
        Width of the output.
    """

    kind: ClassVar[str] = ""
    input_kind: ClassVar[str] = "observation"
    _params: ClassVar[tuple[str, ...]] = ()
    _arrays: ClassVar[tuple[str, ...]] = ()
    _nested: ClassVar[bool] = False  # True: wraps another embedding in ``self.embedding``

    # ---- parameters ----------------------------------------------------------------------
    def get_params(self) -> dict:
        """Return the hyperparameters as a dict (JSON-able values)."""
        return {name: getattr(self, name) for name in self._params}

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({args})"

    # ---- fitted state --------------------------------------------------------------------
    @property
    def is_fitted(self) -> bool:
        """True once ``fit`` has run (or a fitted state was loaded)."""
        return all(hasattr(self, name) for name in self._arrays)

    def _check_fitted(self) -> None:
        if not self.is_fitted:
            raise EmbeddingError(f"the {self.kind} embedding is not fitted; call fit first or load a fitted file")

    def state(self) -> dict[str, np.ndarray]:
        """Return the fitted arrays (name -> ndarray), as saved in embedding files."""
        self._check_fitted()
        return {name: np.asarray(getattr(self, name)) for name in self._arrays}

    def set_state(self, arrays: dict[str, np.ndarray], *, file=None) -> "Embedding":
        """Set the fitted arrays from a saved state, checking their shapes.

        Raises
        ------
        EmbeddingError
            A required array is missing or arrays of inconsistent shapes.
        """
        for name in self._arrays:
            if name not in arrays:
                raise EmbeddingError(f"expected fitted array '{name}' of a {self.kind} embedding", file=file,
                                     key=f"attr.{name}")
            setattr(self, name, np.asarray(arrays[name]))
        self._after_load(file)
        return self

    def _after_load(self, file) -> None:
        """Check loaded arrays and derive the non-array fitted attributes (override)."""

    def _shape_error(self, name: str, expected: str, got, file) -> EmbeddingError:
        return EmbeddingError(f"expected {expected}, got shape {tuple(np.shape(got))}", file=file,
                              key=f"attr.{name}")

    # ---- estimator API -------------------------------------------------------------------
    def fit(self, X, offsets=None) -> "Embedding":  # pragma: no cover - abstract
        """Learn the fitted attributes from features ``X`` (rows = states) and episode row offsets."""
        raise NotImplementedError

    def transform(self, X) -> np.ndarray:  # pragma: no cover - abstract
        """Return the embedding of ``X``, float64 of shape (len(X), output_dim_)."""
        raise NotImplementedError

    def fit_transform(self, X, offsets=None) -> np.ndarray:
        """``fit(X, offsets)`` then ``transform(X)``."""
        return self.fit(X, offsets).transform(X)

    def summary(self) -> dict:
        """Return a JSON-able summary of the fit (method, dims, fit diagnostics)."""
        self._check_fitted()
        return {"method": self.kind, "params": self.get_params(), "input_dim": int(self.n_features_in_),
                "dims": int(self.output_dim_)}
