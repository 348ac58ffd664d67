"""The public ``open_logs``: one log, or a list of files, globs and folders read as one log.

A list is expanded exactly as a recipe's ``[logs] path`` list is (:func:`goalkit.logs.multi.expand_entries`:
natural order of the full paths, each file once, the same errors) and read by
:class:`~goalkit.logs.multi.MultiSource`, so the episodes and their ids are those a build of
such a recipe reads.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path

from goalkit.archive import SourceSpec, is_pattern
from goalkit.errors import LayoutError
from goalkit.logs.layout import Layout, load_layout, parse_layout
from goalkit.logs.multi import LOG_SUFFIXES, MultiSource, expand_entries
from goalkit.logs.opener import open_logs as open_one

#: Layout shapes for which a folder is one log (not a folder of logs).
FOLDER_SHAPES = ("per-file", "bag", "table")


def _as_layout(layout):
    if layout is None or isinstance(layout, Layout):
        return layout
    if isinstance(layout, (str, Path)):
        return load_layout(layout)
    if isinstance(layout, Mapping):
        return parse_layout(layout)
    raise LayoutError(f"expected a Layout, a layout file or a table, got {type(layout).__name__}")


def holds_log_files(folder, layout) -> bool:
    """Whether ``folder`` stands for the log files in it rather than being one log.

    The rule of a recipe's ``[logs] path``: with a layout whose shape is per-file, bag or table a
    folder is one log; with another layout, it stands for its ``.h5``/``.hdf5``/``.hdf``/``.npz``
    files; without a layout, only when it holds HDF5 files (a folder of ``.npz`` files is read as
    per-episode files).
    """
    if not os.path.isdir(folder) or os.path.islink(folder):
        return False
    if layout is not None and layout.shape in FOLDER_SHAPES:
        return False
    try:
        names = [n.lower() for n in os.listdir(folder)]
    except OSError:
        return False
    suffixes = LOG_SUFFIXES if layout is not None else (".h5", ".hdf5", ".hdf")
    return any(n.endswith(suffixes) for n in names)


def log_entries(paths) -> list[str] | None:
    """``paths`` as absolute entries when it names several logs (a list, a glob), else None."""
    if isinstance(paths, (str, Path)):
        return [os.path.abspath(os.path.expanduser(str(paths)))] if is_pattern(str(paths)) else None
    if isinstance(paths, (list, tuple)):
        if not paths:
            raise LayoutError("expected at least one log file, glob or folder, got an empty list",
                              key="open_logs path")
        out = []
        for p in paths:
            if not isinstance(p, (str, Path)) or not str(p):
                raise LayoutError(f"expected a path or a glob (a non-empty string or Path), got {p!r}",
                                  key="open_logs path")
            out.append(os.path.abspath(os.path.expanduser(str(p))))
        return out
    raise LayoutError(f"expected a path, a glob or a list of them, got {type(paths).__name__}",
                      key="open_logs path")


def open_logs(path, layout=None, skip_bad_episodes: bool = False, *, advance=None):
    """Open task logs for reading, chunk by chunk: one log, or several files read as one.

    Parameters
    ----------
    path : str, Path or list of them
        An HDF5 file, a ``.npz`` file, a directory of per-episode ``.npz`` files, a ROS bag or a
        Parquet step table (with a layout); or several logs: a list of files, glob patterns and
        folders (a folder of ``.h5``/``.hdf5``/``.hdf``/``.npz`` files stands for them), or one
        glob pattern. Relative names are relative to the current directory. Several logs are
        expanded and ordered as a recipe's ``[logs] path`` list is: natural order of the full
        paths (``day2`` before ``day10``), each file once, whatever the order given.
    layout : Layout, str, Path or mapping, optional
        The layout (a :class:`~goalkit.logs.layout.Layout`, a layout file, or a parsed TOML
        table), used for every file. When omitted, one is proposed for each file and a note
        says so.
    skip_bad_episodes : bool
        Skip episodes with per-episode problems (recorded in ``skipped``) instead of raising.
    advance : callable, optional
        Called with a number of transitions as the bad-episode check proceeds (one log only).

    Returns
    -------
    LogSource
        With ``path``, ``files``, ``lengths``, ``episode_ids``, ``fields``, ``notes``,
        ``skipped``, ``layout``, ``convention`` and ``read(start, stop)``. Several files: a
        :class:`~goalkit.logs.multi.MultiSource`, whose episode ids are positions in the files
        taken one after the other.

    Raises
    ------
    LogError, LayoutError
        One line naming the file: a missing file or folder, a glob that matches nothing, a
        folder without log files, files that disagree on widths or roles, or a problem in a file.

    Examples
    --------
    >>> src = open_logs("gantry.h5", "layout.toml")                        # doctest: +SKIP
    >>> src = open_logs(["day*.h5", "late/"], "layout.toml")              # doctest: +SKIP
    >>> chunk = src.read(0, 10)                                            # doctest: +SKIP
    """
    entries = log_entries(path)
    layout = _as_layout(layout)
    if entries is None:
        single = os.path.abspath(os.path.expanduser(str(path)))
        if not holds_log_files(single, layout):
            return open_one(path, layout, skip_bad_episodes, advance=advance)
        entries = [single]
    files = expand_entries(entries, layout.shape if layout is not None else None, key=None)
    if len(files) == 1:
        return open_one(files[0], layout, skip_bad_episodes, advance=advance)
    return MultiSource([SourceSpec("", tuple(files), layout, bool(skip_bad_episodes), None)])
