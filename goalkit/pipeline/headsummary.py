"""The build summary's ``heads`` entry: rows and reached rows per goal head and goal source.

Present only in sets built with ``[output] goals = "heads"`` (found by their ``source@NAME``
columns), so the summaries of other sets are unchanged.
"""

from __future__ import annotations

import numpy as np

from goalkit.heads import SOURCE_CODES
from goalkit.rows import HEAD_SEPARATOR

_NAMES = {code: name for name, code in SOURCE_CODES.items()}
_SIZE = len(SOURCE_CODES)


class HeadSummary:
    """Accumulate per-head counts chunk by chunk (exact, independent of chunking)."""

    def __init__(self):
        self.rows: dict = {}
        self.reached: dict = {}

    def add(self, cols: dict) -> None:
        """Count the head columns of one chunk's rows (no-op without head columns)."""
        prefix = "source" + HEAD_SEPARATOR
        for key in cols:
            if not key.startswith(prefix):
                continue
            head = key[len(prefix):]
            src = np.asarray(cols[key], dtype=np.int64)
            reached = np.asarray(cols[f"reached{HEAD_SEPARATOR}{head}"], dtype=np.float64)
            rows = self.rows.setdefault(head, np.zeros(_SIZE, np.int64))
            hit = self.reached.setdefault(head, np.zeros(_SIZE, np.int64))
            rows += np.bincount(src, minlength=_SIZE)[:_SIZE]
            hit += np.bincount(src, weights=reached, minlength=_SIZE)[:_SIZE].astype(np.int64)

    def result(self) -> dict:
        """``{"heads": [{"name", "rows", "reached_fraction", "sources": {source: {"rows", "reached"}}}, ...]}``
        in the heads' order (their slots), or {} without heads."""
        if not self.rows:
            return {}
        out = []
        for head, rows in self.rows.items():
            total = int(rows.sum())
            hit = self.reached[head]
            out.append({"name": head, "rows": total, "reached_fraction": float(hit.sum() / total) if total else 0.0,
                         "sources": {_NAMES[c]: {"rows": int(rows[c]), "reached": int(hit[c])}
                                     for c in range(_SIZE) if rows[c]}})
        return {"heads": out}
