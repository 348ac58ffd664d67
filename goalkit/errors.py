"""One exception hierarchy for everything a user can get wrong.

Every user-facing error carries *where* it happened (file, key, episode, step) and
*what was expected*, and renders as a single line. The CLI turns a
:class:`GoalkitError` into that line on stderr and exit status 2.
"""

from __future__ import annotations


class GoalkitError(Exception):
    """Base class of all errors caused by the user's input.

    Parameters
    ----------
    message : str
        What is wrong and what was expected, e.g. ``"expected 2-D float array, got shape (10,)"``.
    file, key : str, optional
        The file and the key (dataset, table entry, option) the problem was found in.
    episode, step : int, optional
        The episode (position in the log) and step the problem was found at.

    Examples
    --------
    >>> str(GoalkitError("expected finite values, got NaN", file="a.h5", key="obs", episode=3, step=17))
    'a.h5: key obs: episode 3: step 17: expected finite values, got NaN'
    """

    def __init__(self, message: str, *, file=None, key=None, episode=None, step=None):
        self.message = message
        self.file = None if file is None else str(file)
        self.key = key
        self.episode = episode
        self.step = step
        super().__init__(self.render())

    def render(self) -> str:
        """Return the one-line form ``file: key K: episode E: step S: message``."""
        parts = []
        if self.file is not None:
            parts.append(self.file)
        if self.key is not None:
            parts.append(f"key {self.key}")
        if self.episode is not None:
            parts.append(f"episode {self.episode}")
        if self.step is not None:
            parts.append(f"step {self.step}")
        parts.append(self.message)
        return ": ".join(parts)

    def __str__(self) -> str:  # keep in sync if attributes are changed after construction
        return self.render()


class LogError(GoalkitError):
    """A task log is missing, unreadable, or inconsistent."""


class LayoutError(GoalkitError):
    """A layout file is malformed or does not match the logs."""


class RecipeError(GoalkitError):
    """A recipe file is malformed or asks for something impossible."""


class DatasetError(GoalkitError):
    """A built dataset is missing, unreadable, or of an unknown version."""


class EmbeddingError(GoalkitError):
    """An embedding file is malformed or does not fit the goal features."""


class OutputError(GoalkitError):
    """An output cannot be written safely: it is an input, it exists, or a link is in the way."""


def shown(value) -> str:
    """``value`` as a message shows it: numbers plain (``1.0``, never ``np.float32(1.0)``).

    numpy scalars print as their shortest text for their dtype (``str``), arrays, lists and
    tuples as ``[a, b, ...]`` of such numbers; text keeps its quotes (``repr``), as do other
    values.

    Examples
    --------
    >>> import numpy as np
    >>> shown(np.float32(0.04)), shown([np.int64(3), 1.5]), shown("x")
    ('0.04', '[3, 1.5]', "'x'")
    """
    if hasattr(value, "dtype") and getattr(value, "shape", None) == ():  # a numpy scalar or 0-d array
        return str(value[()] if hasattr(value, "__getitem__") else value)
    if hasattr(value, "tolist") and hasattr(value, "shape"):
        value = list(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(shown(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{shown(k)}: {shown(v)}" for k, v in value.items()) + "}"
    return repr(value)
