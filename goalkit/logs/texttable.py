"""Plain-text tables for the reports of ``goalkit scan`` (used by the scan command and the bag lister)."""

from __future__ import annotations


def text_table(header, rows) -> list[str]:
    """Left-aligned columns, two spaces apart, each line indented by two spaces.

    Examples
    --------
    >>> text_table(("a", "bb"), [(1, 2), (333, 4)])
    ['  a    bb', '  1    2', '  333  4']
    """
    cells = [tuple(str(c) for c in header)] + [tuple(str(c) for c in r) for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    return ["  " + "  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in cells]
