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


class ParameterError(GoalkitError, ValueError):
    """A library object was given an impossible value for one of its own parameters.

    Raised by the domain objects (:class:`~goalkit.reward.RewardRule`,
    :class:`~goalkit.relabel.Mixture`), whoever builds them: it names the object and the
    parameter, never a file, e.g. ``RewardRule threshold: expected a finite number >= 0, got
    -1.0``. The recipe loader re-raises it with :meth:`in_recipe`, naming the recipe file and
    key. Also a :class:`ValueError`, as Python code building the object would expect.

    Parameters
    ----------
    message : str
        What is wrong and what was expected.
    owner : str
        The object's class name, e.g. ``"RewardRule"``.
    parameter : str, optional
        The parameter, as named by the constructor; a dotted path for an entry of a mapping
        (``"weights.future"``). None when the problem is the whole object.

    Examples
    --------
    >>> err = ParameterError("expected a finite number >= 0, got -1.0", owner="RewardRule", parameter="threshold")
    >>> str(err)
    'RewardRule threshold: expected a finite number >= 0, got -1.0'
    >>> str(err.in_recipe("recipe.toml", "reward"))
    'recipe.toml: key reward.threshold: expected a finite number >= 0, got -1.0'
    """

    def __init__(self, message: str, *, owner: str, parameter: str | None = None):
        self.owner = owner
        self.parameter = parameter
        super().__init__(message)

    def render(self) -> str:
        where = self.owner if self.parameter is None else f"{self.owner} {self.parameter}"
        return f"{where}: {self.message}"

    def in_recipe(self, file, table: str) -> "RecipeError":
        """The same problem as a recipe error: ``file``, key ``table.parameter``."""
        key = table if self.parameter is None else f"{table}.{self.parameter}"
        return RecipeError(self.message, file=file, key=key)


class StrategyError(GoalkitError):
    """A relabelling strategy cannot serve the episodes it was given (names the log file and episode)."""


class LabelError(GoalkitError):
    """A labelled-pairs file, or the logs' own success labels, cannot be used (threshold tuning)."""


class TuningError(GoalkitError):
    """The labelled data cannot answer the question asked (e.g. no reached pairs at all)."""


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
