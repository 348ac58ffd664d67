"""``open_logs``: pick the reader for a layout's shape and open the log."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

from goalkit.errors import LayoutError
from goalkit.logs.bagfile import BagSource, is_bag_path
from goalkit.logs.bagscan import list_topics, propose_bag_layout
from goalkit.logs.detect import propose_layout
from goalkit.logs.flat import FlatSource
from goalkit.logs.grouped import GroupedSource
from goalkit.logs.layout import Layout, load_layout, parse_layout
from goalkit.logs.perfile import PerFileSource
from goalkit.logs.steptable import TableSource


def open_logs(path, layout=None, skip_bad_episodes: bool = False, *, advance=None):
    """Open task logs for reading, chunk by chunk.

    Parameters
    ----------
    path : str or Path
        An HDF5 file, a ``.npz`` file, or a directory of per-episode ``.npz`` files.
    layout : Layout, str, Path or mapping, optional
        The layout (a :class:`~goalkit.logs.layout.Layout`, a layout file, or a parsed TOML
        table). When omitted, one is proposed with :func:`~goalkit.logs.detect.propose_layout`
        and a note says so.
    skip_bad_episodes : bool
        Skip episodes with per-episode problems (recorded in ``skipped``) instead of raising.
        File-level problems always raise. Finding bad values needs one read of the whole log,
        done here, chunk by chunk.
    advance : callable, optional
        Called with a number of transitions as that check proceeds (a progress bar's update).

    Returns
    -------
    LogSource
        With ``path``, ``files``, ``lengths``, ``episode_ids``, ``fields``, ``notes``,
        ``skipped``, ``layout``, ``convention`` and ``read(start, stop)``.

    Raises
    ------
    LogError, LayoutError
        One-line errors naming file, key, episode and step.

    Examples
    --------
    >>> src = open_logs("gantry.h5", "layout.toml")          # doctest: +SKIP
    >>> chunk = src.read(0, 10)                               # doctest: +SKIP
    """
    proposed = False
    if layout is None:
        if is_bag_path(path):
            layout = propose_bag_layout(list_topics(path))
        else:
            layout = propose_layout(path)
        proposed = True
    elif isinstance(layout, (str, Path)):
        layout = load_layout(layout)
    elif isinstance(layout, Mapping):
        layout = parse_layout(layout)
    elif not isinstance(layout, Layout):
        raise LayoutError(f"expected a Layout, a layout file or a table, got {type(layout).__name__}")
    reader = {"grouped": GroupedSource, "flat": FlatSource, "per-file": PerFileSource, "bag": BagSource,
              "table": TableSource}[layout.shape]
    source = reader(path, layout, skip_bad_episodes=skip_bad_episodes, advance=advance)
    if proposed:
        source.notes.insert(0, "no layout given: read with a proposed layout")
    return source
