"""The short Markdown card of a suite, written beside it (``SUITE.md``)."""

from __future__ import annotations

import json
import os
from pathlib import Path

from goalkit.outputs import open_no_follow

#: First line of every suite card (what makes an existing card "ours" for --replace).
CARD_HEADER = "# Held-out goal suite"

def card_path(suite_path) -> Path:
    """The card of a suite file: the same name with suffix ``.md``."""
    p = Path(suite_path)
    return p.with_suffix(".md") if p.suffix != ".md" else p.with_name(p.name + ".card.md")

def is_suite_card(path) -> bool:
    """True when ``path`` is a small text file starting with :data:`CARD_HEADER`."""
    try:
        with os.fdopen(open_no_follow(path, os.O_RDONLY, 0), "rb") as f:
            head = f.read(len(CARD_HEADER.encode()))
    except OSError:
        return False
    return head == CARD_HEADER.encode()

def render_card(suite_path, attrs: dict) -> str:
    """The card's Markdown text from the suite's attributes."""
    s, c = attrs["strata"], attrs["counts"]
    lines = [
        CARD_HEADER, "",
        f"File: `{Path(suite_path).name}`, {c['rows']} rows from {c['episodes']} held-out episodes, drawn from the "
        f"validation split of `{attrs['set_path']}` (set checksum `{attrs['set_checksum'][:16]}...`, seed "
        f"{attrs['seed']}).", "",
        "Each row is a held-out (state, goal, horizon, reachable) pair with the logged action at the state. "
        "The split is by episode, so no state or goal of these episodes was in the training split.", "",
        "## How the rows were chosen", "",
        f"- {c['candidates']} candidate rows of {c['validation_rows']} validation rows (smallest address hash).",
        f"- Route: `episode` when the pair's own episode reaches the goal later (horizon j - t), `stitched` when "
        f"only a path joining several held-out episodes does (neighbour joins within {s['join_radius']:.6g} in goal "
        f"space, {s['join_neighbours']} nearest states; {c['joins']} joins; horizon = the joined graph's steps), "
        f"`none` otherwise (horizon -1). Joins stand in for temporal-distance labels until those exist.",
        f"- Horizon buckets (steps-to-goal): {', '.join(s['buckets'])}.",
        f"- Near / far: Euclidean distance of the goal to the nearest training goal (faiss, {s['index']['method']} "
        f"search), cut at {s['near_far_cut']:.6g}"
        + (f" (the {s['far_quantile']:g} quantile of the candidates)." if s.get("far_quantile") is not None else "."),
        f"- At most {s['per_cell']} rows per (route, bucket, proximity) cell, chosen by the seed.", "",
        "## Rows per cell", "",
        "| route | horizon | proximity | candidates | rows |", "| --- | --- | --- | --- | --- |",
    ]
    for cell in c["cells"]:
        lines.append(f"| {cell['route']} | {cell['bucket']} | {cell['proximity']} | {cell['candidates']} | "
                     f"{cell['rows']} |")
    lines += ["", "## Limits", "",
              "- Scores on a suite (`goalkit assess`) are offline proxies computed against logged behaviour. "
              "They are not a substitute for supervised trials on the machine: test in simulation first, "
              "under supervision, following robot-safety standards and local regulations, with qualified "
              "safety engineers (see the README's safety section).",
              "- A `none` pair may still be reachable by behaviour the logs never show; a `stitched` horizon is "
              "an upper bound from logged paths only.", "",
              "Settings (JSON): `" + json.dumps(s, sort_keys=True) + "`", ""]
    return "\n".join(lines)
