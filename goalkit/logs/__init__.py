"""Reading task logs: layout files, readers for each storage shape, the EpisodeSet."""

from goalkit.logs.episodes import EpisodeSet, LogSource, iter_chunks

__all__ = ["EpisodeSet", "LogSource", "iter_chunks"]
