"""Natural ordering of names, so that ``ep2`` comes before ``ep10``."""

from __future__ import annotations

import re

_PARTS = re.compile(r"(\d+)")


def natural_key(name: str) -> tuple:
    """Sort key splitting digit runs into numbers.

    Examples
    --------
    >>> sorted(["ep10", "ep2", "ep1"], key=natural_key)
    ['ep1', 'ep2', 'ep10']
    """
    return tuple((0, int(p), p) if p.isdigit() else (1, p, p) for p in _PARTS.split(name) if p != "")


def natural_sorted(names) -> list[str]:
    """Return ``names`` in natural order (ties broken by the plain string)."""
    return sorted(names, key=lambda n: (natural_key(n), n))
