"""An archive's sources as a recipe names them, and their stable episode ids (no I/O, no heavy imports).

See :mod:`goalkit.logs.multi` for reading them.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

#: Episode ids of a named source are ``tag << SOURCE_SHIFT`` + position (2**40 episodes each).
SOURCE_SHIFT = 40
#: Named-source tags are 1 .. 2**23 - 1 (ids stay below 2**63).
TAG_RANGE = (1 << 23) - 1
_GLOB_CHARS = set("*?[")


def is_pattern(text: str) -> bool:
    """True when ``text`` holds a glob character (``*``, ``?``, ``[``)."""
    return bool(_GLOB_CHARS & set(str(text)))


def source_base(name: str) -> int:
    """The first episode id of source ``name`` (0 for the unnamed source).

    Examples
    --------
    >>> source_base("")
    0
    >>> source_base("teleop") == source_base("teleop") > 0
    True
    """
    if name == "":
        return 0
    digest = hashlib.sha256(name.encode("utf-8")).digest()
    return (1 + int.from_bytes(digest[:8], "big") % TAG_RANGE) << SOURCE_SHIFT


@dataclass(frozen=True)
class InlineLayout:
    """A layout written in the recipe itself (``[logs.layout]`` or a source's ``layout`` table).

    Kept as its TOML table here (loading a recipe stays light); :mod:`goalkit.logs.multi` parses
    it when the logs are opened, naming ``file`` and ``key`` in its errors.
    """

    table: dict
    file: str = "<recipe>"
    key: str = "logs.layout"

    def __hash__(self):
        return hash((self.file, self.key, repr(self.table)))


@dataclass(frozen=True)
class SourceSpec:
    """One source of a recipe.

    Attributes
    ----------
    name : str
        The user's name for it ("" for the one source of ``[logs]``).
    entries : tuple of str
        Absolute files, folders and glob patterns.
    layout : goalkit.logs.layout.Layout, InlineLayout or None
        Its layout (None: proposed from its first file, or read from ``layout_path``).
    skip_bad_episodes : bool
    key : str
        The recipe key it came from, for messages (``logs.path``, ``sources[1].path``).
    layout_path : str
        The layout file it was read from ("" when none).
    layout_text : str
        The layout's text as recorded in a set (reopening a set's sources; else "").
    """

    name: str
    entries: tuple
    layout: object = None
    skip_bad_episodes: bool = False
    key: str = "logs.path"
    layout_path: str = ""
    layout_text: str = ""
