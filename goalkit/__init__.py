"""goalkit: turn existing task logs into goal-conditioned training sets.

The flow is reader -> goal map -> relabelling strategies -> reward rule -> writer.
Everything downstream of the reader sees only an :class:`~goalkit.logs.episodes.EpisodeSet`
and a goal map, never a file format.
"""

__version__ = "0.1.0"

from goalkit.errors import GoalkitError  # noqa: E402

__all__ = ["GoalkitError", "__version__"]
