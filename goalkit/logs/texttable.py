"""Plain-text tables for the reports of ``goalkit scan`` (log summary and bag topics)."""

from __future__ import annotations


def text_table(header, rows) -> list[str]:
    """Lines of a left-aligned table, two spaces between columns, each line indented two spaces.

    Parameters
    ----------
    header : sequence
        Column titles.
    rows : iterable of sequence
        Cells, turned into text with ``str``.

    Returns
    -------
    list of str

    Examples
    --------
    >>> text_table(("a", "bb"), [(1, 2), (333, 4)])
    ['  a    bb', '  1    2', '  333  4']
    """
    cells = [tuple(str(c) for c in header)] + [tuple(str(c) for c in r) for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    return ["  " + "  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in cells]
