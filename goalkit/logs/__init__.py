"""Reading task logs: layout files, readers for each storage shape, the EpisodeSet."""

from goalkit.logs.detect import propose_layout
from goalkit.logs.episodes import EpisodeSet, LogSource, iter_chunks
from goalkit.logs.layout import Layout, layout_to_toml, load_layout, parse_layout
from goalkit.logs.anylogs import open_logs

__all__ = ["EpisodeSet", "LogSource", "iter_chunks", "Layout", "layout_to_toml", "load_layout",
           "parse_layout", "open_logs", "propose_layout"]

