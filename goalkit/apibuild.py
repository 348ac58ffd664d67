"""The build part of goalkit's public API: ``goalkit.build`` and its runners.

Kept apart from :mod:`goalkit.api` so that ``goalkit.build`` loads the engine only (not verify,
tune, suites and assessment): a build's own start-up is part of what it costs. Import the names
from :mod:`goalkit`.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any

from goalkit.errors import GoalkitError
from goalkit.pipeline.build import BuildResult
from goalkit.pipeline.build import build as _engine_build
from goalkit.pipeline.recipe import Recipe, load_recipe

__all__ = ["InProcess", "LocalWorkers", "DaskCluster", "RUNNERS", "build", "as_recipe"]


@dataclass(frozen=True)
class InProcess:
    """Run a build in this process (threads); the default runner."""

    def engine_arguments(self) -> dict:
        """The keyword arguments of the engine's build for this runner."""
        return {}


@dataclass(frozen=True)
class LocalWorkers:
    """Run a build on ``n`` local worker processes, each chunk a resumable shard.

    Parameters
    ----------
    n : int
        Number of worker processes, at least 1.
    """

    n: int

    def __post_init__(self):
        if isinstance(self.n, bool) or not isinstance(self.n, int) or self.n < 1:
            raise GoalkitError(f"expected a whole number of worker processes >= 1, got {self.n!r}",
                               key="LocalWorkers.n")

    def engine_arguments(self) -> dict:
        """The keyword arguments of the engine's build for this runner."""
        return {"workers": self.n}


@dataclass(frozen=True)
class DaskCluster:
    """Run a build's shards on a Dask cluster (needs ``pip install 'goalkit[dask]'``).

    Parameters
    ----------
    cluster : str or distributed.Client
        The address of a running scheduler (``"tcp://head:8786"``), or an existing client
        (used, not closed).
    """

    cluster: Any

    def __post_init__(self):
        if isinstance(self.cluster, str) and not self.cluster.strip():
            raise GoalkitError("expected a Dask scheduler address or client, got an empty string",
                               key="DaskCluster.cluster")

    def engine_arguments(self) -> dict:
        """The keyword arguments of the engine's build for this runner."""
        if isinstance(self.cluster, str):
            return {"scheduler": self.cluster}
        return {"client": self.cluster}


RUNNERS = (InProcess, LocalWorkers, DaskCluster)


def as_recipe(recipe) -> Recipe:
    """``recipe`` if it is a Recipe, else the recipe file at that path, loaded."""
    if isinstance(recipe, Recipe):
        return recipe
    if isinstance(recipe, (str, os.PathLike)):
        return load_recipe(recipe)
    raise GoalkitError(f"expected a Recipe or the path of a recipe file, got {type(recipe).__name__}",
                       key="recipe")


def build(recipe, *, runner=None, out=None, seed: int | None = None, max_rows_per_chunk: int | None = None,
          progress=None, fresh: bool = False, replace: bool = False, card: bool = True,
          keep_work: bool = False) -> BuildResult:
    """Build the goal-conditioned set a recipe describes.

    Parameters
    ----------
    recipe : Recipe, str or Path
        A loaded recipe (:func:`goalkit.load_recipe`) or the path of a recipe file.
    runner : InProcess, LocalWorkers or DaskCluster, optional
        Where the chunks are relabelled: this process (default), ``LocalWorkers(n)`` local
        worker processes, or ``DaskCluster(address_or_client)``. The file's bytes are the same
        whichever runner builds it.
    out : str or Path, optional
        Write the set here instead of the recipe's ``[output] path``.
    seed : int, optional
        Use this seed instead of the recipe's.
    max_rows_per_chunk : int, optional
        Output rows per chunk; only memory and speed depend on it, never the bytes.
    progress : callable, optional
        Called as ``progress(transitions_done_in_chunk, total_transitions)`` after each chunk.
    fresh : bool
        Runners with shards: discard the shards of an interrupted run instead of resuming.
    replace : bool
        Replace an existing goalkit set at the output path (never any other file), and an
        existing card beside it.
    card : bool
        Write the dataset card ``NAME.card.md`` and its plot ``NAME.card-goals.png`` beside the
        set (docs/card.md).
    keep_work : bool
        Keep the relabelled rows in the work folder ``.NAME.work`` beside the set and reuse
        those of unchanged episodes (same log file checksum and position, same recipe apart
        from its log paths) instead of relabelling them; the set's bytes are the same
        (docs/scaling.md, "Logs that grow").

    Returns
    -------
    BuildResult
        ``path`` of the set, its ``summary``, the ``card`` files, ``seconds`` and ``file_bytes``;
        with ``keep_work``, ``reuse``: episodes reused and new, and the work folder's size.

    Raises
    ------
    GoalkitError
        On a bad recipe, bad logs, an unknown runner, or an output that would touch an input or
        exists without ``replace``.

    Examples
    --------
    >>> import goalkit                                                  # doctest: +SKIP
    >>> goalkit.build("gantry-recipe.toml", runner=goalkit.LocalWorkers(2))  # doctest: +SKIP
    """
    runner = InProcess() if runner is None else runner
    if not isinstance(runner, RUNNERS):
        raise GoalkitError(f"expected a runner (goalkit.InProcess(), goalkit.LocalWorkers(n) or "
                           f"goalkit.DaskCluster(address_or_client)), got {type(runner).__name__}",
                           key="runner")
    parsed = as_recipe(recipe)
    if out is not None or seed is not None:
        parsed = parsed.with_overrides(seed=seed, out=out)
    return _engine_build(parsed, max_rows_per_chunk=max_rows_per_chunk, progress=progress, fresh=fresh,
                         replace=replace, card=card, keep_work=keep_work, **runner.engine_arguments())
