"""The functions behind goalkit's public API (``goalkit.build``, ``goalkit.verify``, ...).

A thin facade over the engine and the commands' own functions: it takes a recipe or its path,
and one ``runner`` object (:class:`InProcess`, :class:`LocalWorkers`, :class:`DaskCluster`,
defined with ``build`` in :mod:`goalkit.apibuild`) instead of the engine's separate
``workers`` / ``scheduler`` / ``client`` arguments. Import the
names from :mod:`goalkit`, not from here: ``goalkit`` loads this module only when one of them
is first used, so ``import goalkit`` stays fast.
"""

from __future__ import annotations

from goalkit.errors import GoalkitError
from goalkit.logs.anylogs import open_logs
from goalkit.logs.scan import scan_logs
from goalkit.apibuild import DaskCluster, InProcess, LocalWorkers, build  # noqa: F401  (re-exported)
from goalkit.apibuild import as_recipe as _recipe
from goalkit.pipeline.recipe import Recipe
from goalkit.pipeline.scansources import scan_sources
from goalkit.scoring.run import AssessResult, assess_suite
from goalkit.suites.make import SuiteResult
from goalkit.suites.make import make_suite as _make_suite
from goalkit.suites.strata import DEFAULT_EDGES
from goalkit.thresholds.session import CHUNK_TRANSITIONS, MAX_TRANSITIONS, TuneResult, tune_recipe
from goalkit.write.verify import VerifyReport, verify_set

__all__ = ["InProcess", "LocalWorkers", "DaskCluster", "build", "verify", "scan", "tune", "make_suite", "assess"]


def verify(path, *, max_failures: int = 20, progress=None, audit: bool = True, logs_root=None) -> VerifyReport:
    """Re-derive a built set from its logs and recipe and check every row and checksum.

    Parameters
    ----------
    path : str or Path
        The set (an HDF5 file written by :func:`build`).
    max_failures : int
        Stop collecting failure messages after this many.
    progress : callable, optional
        Called as ``progress(transitions_done_in_chunk, total_transitions)`` after each chunk.
    audit : bool
        Also run the statistical audit of the rows.
    logs_root : str or Path, optional
        The folder that now holds the logs the set was built from, when they moved (it stands for
        the logs' common folder at build time). Files are looked for beside the set first, then at
        their recorded paths, then under ``logs_root`` by their place and by size and SHA-256.
        The set is never modified (docs/dataset.md, "Moving a set and its logs").

    Returns
    -------
    VerifyReport
        ``ok`` (True when consistent), ``failures`` (messages) and ``checked`` (what was checked;
        ``checked["moved_files"]`` maps recorded paths to where moved files were found).

    Raises
    ------
    DatasetError
        When the file cannot be read as a goalkit set, a file it was built from is found nowhere,
        or the file found under ``logs_root`` has another checksum.
    """
    return verify_set(path, max_failures=max_failures, progress=progress, audit=audit, logs_root=logs_root)


def scan(logs, layout=None, *, skip_bad_episodes: bool = False, max_transitions: int = 200_000) -> dict:
    """Read task logs once and report what is in them (what ``goalkit scan`` prints).

    Parameters
    ----------
    logs : str, Path or list of them
        An HDF5 file, ``.npz`` file, folder of per-episode files, bag or step table; or several
        log files as a list of files, globs and folders (as :func:`goalkit.open_logs` takes); or a
        loaded :class:`Recipe`, whose every source is reported on its own (what ``goalkit scan
        RECIPE.toml`` prints; ``layout`` and the other arguments are then not used).
    layout : Layout, str, Path or mapping, optional
        The layout (a file, a parsed table or a :class:`Layout`); None proposes one.
    skip_bad_episodes : bool
        Skip episodes with per-episode problems instead of raising.
    max_transitions : int
        Transitions per chunk read.

    Returns
    -------
    dict
        ``episodes``, ``steps``, ``lengths``, ``keys``, ``observation_range``,
        ``success_by_task``, ``rewards``, ``notes``, ``skipped`` and ``problems``. For a recipe:
        ``recipe``, ``ok`` and ``sources`` (see ``docs/layout.md``, "Scanning a recipe's sources").

    Raises
    ------
    LogError, LayoutError
        On unreadable logs or a layout that does not fit them.
    """
    if isinstance(logs, Recipe):
        return scan_sources(logs)
    source = open_logs(logs, layout, skip_bad_episodes=skip_bad_episodes)
    return scan_logs(source, max_transitions=max_transitions)


def tune(recipe, *, labels=None, from_success: bool = False, distances=(), chooser: str = "max-f1",
         target: float | None = None, n_resamples: int = 1000, max_transitions: int = MAX_TRANSITIONS,
         progress=None) -> TuneResult:
    """Choose a recipe's goal-match threshold from labels, or describe its goal space without.

    Parameters
    ----------
    recipe : Recipe, str or Path
        A loaded recipe or the path of a recipe file.
    labels : str or Path, optional
        A labelled-pairs file (.npz or .csv: achieved, goal, reached, episode).
    from_success : bool
        Label each logged transition by its success flag against its task goal.
    distances : sequence of str
        Candidate distances (default: the recipe's).
    chooser : {"max-f1", "target-precision", "youden"}
        How the threshold is picked.
    target : float, optional
        Precision that ``target-precision`` must keep, in (0, 1].
    n_resamples : int
        Bootstrap resamples over episodes for the interval (0: none).
    max_transitions : int
        Read at most this many transitions (whole episodes, a fixed sample by the recipe's seed).
    progress : callable, optional
        Called as ``progress(transitions_done_in_chunk, total_transitions)``.

    Returns
    -------
    TuneResult
        ``recipe_threshold()``, ``recipe_distance()``, ``as_dict()``, ``render()`` and
        ``write_plots(folder)``; :func:`goalkit.write_tuned_recipe` writes the tuned copy.

    Raises
    ------
    GoalkitError
        (LabelError, TuningError, RecipeError, LogError) on bad input, naming file and key.
    """
    return tune_recipe(_recipe(recipe), labels=labels, from_success=from_success, distances=distances,
                       chooser=chooser, target=target, n_resamples=n_resamples,
                       max_transitions=max_transitions, chunk_transitions=CHUNK_TRANSITIONS, progress=progress)


def make_suite(dataset, out, *, edges=DEFAULT_EDGES, far_quantile: float = 0.5, far_distance: float | None = None,
               join_radius: float | None = None, join_neighbours: int = 8, per_cell: int = 100,
               candidates: int = 20_000, seed: int = 0, replace: bool = False, logs_root=None) -> SuiteResult:
    """Draw a held-out goal suite from a built set's validation split (``goalkit suite``).

    Rows are (state, goal, horizon, reachable) pairs with the logged action, stratified by route
    (the own episode reaches the goal; only several held-out episodes joined within
    ``join_radius`` do; none), horizon bucket (``edges``) and distance to the nearest training
    goal (near / far). A Markdown card is written beside the suite. See docs/suites.md.

    Parameters
    ----------
    dataset, out : str or Path
        The set, and the suite file to write (never over an input; an existing one only with
        ``replace``).
    edges : sequence of int
        Horizon bucket edges in steps.
    far_quantile, far_distance : float
        The near/far cut: a quantile of the candidates' distances, or an explicit distance.
    join_radius : float, optional
        Neighbour-join radius in goal space (default: the set's Euclidean reward threshold).
    join_neighbours, per_cell, candidates, seed : int
        Neighbours searched, rows per cell, candidate rows, seed.
    replace : bool
    logs_root : str or Path, optional
        Indexed sets: the folder that now holds the logs, when they moved (as :func:`verify`).

    Returns
    -------
    SuiteResult

    Examples
    --------
    >>> suite = goalkit.make_suite("gantry-goals.h5", "gantry-suite.h5", per_cell=50)   # doctest: +SKIP
    """
    return _make_suite(dataset, out, edges=edges, far_quantile=far_quantile, far_distance=far_distance,
                       join_radius=join_radius, join_neighbours=join_neighbours, per_cell=per_cell,
                       candidates=candidates, seed=seed, replace=replace, logs_root=logs_root)


def assess(dataset, suite, *, policies=(), values=(), import_path=None, batch_size: int = 1024,
           resamples: int = 1000, confidence: float = 0.95, seed: int = 0) -> AssessResult:
    """Score up to two policies and two value functions on a suite, offline (``goalkit assess``).

    Entry points are ``package.module:callable`` strings; only the named modules are imported.
    A policy gets ``{"observation": (B, D), "goal": (B, G)}`` numpy arrays and returns ``(B, A)``
    actions, a value function returns ``(B,)`` values. Scores are offline proxies, not a
    substitute for supervised trials on the machine. See docs/suites.md.

    Parameters
    ----------
    dataset, suite : str or Path
        The set and a suite drawn from it (checked by checksum).
    policies, values : sequence of str
        Entry points, at most two of each.
    import_path : str or Path, optional
        Folder to import the entry points from.
    batch_size, resamples : int
    confidence : float
    seed : int
        Seed of the episode resamples.

    Returns
    -------
    AssessResult
        ``.report`` (JSON-able), ``.render()`` (text), ``.write_plots(folder)``.

    Examples
    --------
    >>> res = goalkit.assess("gantry-goals.h5", "gantry-suite.h5", policies=["mypkg.ck:act"])  # doctest: +SKIP
    >>> print(res.render())                                                                      # doctest: +SKIP
    """
    return assess_suite(dataset, suite, policies=policies, values=values, import_path=import_path,
                        batch_size=batch_size, resamples=resamples, confidence=confidence, seed=seed)
