"""PNG: graph distance (``graph_steps``) against goal distance, one panel per strategy.

Reads a built set with a ``graph_steps`` column (recipe ``[graph]`` table; docs/recipe.md).
Rows are an evenly spaced sample of each split, so the plot costs the same for any set size.
Rows beyond the horizon (-2) are counted in each panel's title, rows not computed (-1) left out.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from goalkit.errors import DatasetError
from goalkit.outputs import save_png
from goalkit.write.format import SPLITS, open_set_file

#: Rows read per split at most.
SAMPLE_ROWS = 20_000


def has_graph_steps(path) -> bool:
    """True when the set at ``path`` stores a ``graph_steps`` column (built with ``[graph]``)."""
    with open_set_file(path) as f:
        return all(s in f and "graph_steps" in f[s] for s in SPLITS)


def read_graph_columns(path, sample: int = SAMPLE_ROWS) -> dict:
    """strategy, goal_distance and graph_steps of an evenly spaced sample of rows, and the code table."""
    cols = {"strategy": [], "goal_distance": [], "graph_steps": []}
    with open_set_file(path) as f:
        names = {}
        for s in SPLITS:
            grp = f[s]
            if "graph_steps" not in grp:
                raise DatasetError("the set has no graph_steps column (built without a [graph] table)",
                                   file=path, key=f"{s}/graph_steps")
            n = grp["strategy"].shape[0]
            idx = np.unique(np.linspace(0, n - 1, min(n, sample)).astype(np.int64)) if n else np.zeros(0, np.int64)
            for k in cols:
                cols[k].append(grp[k][idx] if len(idx) else np.zeros(0, grp[k].dtype))
            codes = grp["strategy"].attrs.get("codes")
            if codes is not None:
                names.update({int(k): v for k, v in json.loads(codes).items()})
    return {**{k: np.concatenate(v) for k, v in cols.items()}, "names": names}


def plot_graph_distance(path, out, *, replace: bool = False, sample: int = SAMPLE_ROWS) -> Path:
    """Write a PNG of graph steps against goal distance per strategy of the set at ``path``.

    Parameters
    ----------
    path : str or Path
        A built set with a ``graph_steps`` column.
    out : str or Path
        The PNG to write (never over a file that is not a PNG; an existing PNG only with ``replace``).

    Returns
    -------
    Path
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    c = read_graph_columns(path, sample)
    codes = sorted(np.unique(c["strategy"]).tolist())
    fig = Figure(figsize=(4.0 * max(len(codes), 1), 3.6), dpi=100)
    FigureCanvasAgg(fig)
    for i, code in enumerate(codes or [0]):
        ax = fig.add_subplot(1, max(len(codes), 1), i + 1)
        m = c["strategy"] == code
        g, d = c["graph_steps"][m], c["goal_distance"][m]
        fin = g >= 0
        ax.scatter(d[fin], g[fin], s=3, alpha=0.4, color="tab:blue", rasterized=True)
        name = c["names"].get(code, str(code))
        ax.set(xlabel="goal distance", ylabel="graph steps from s_t+1",
               title=f"{name}: {int(fin.sum())} rows, {int((g == -2).sum())} beyond horizon")
        ax.title.set_fontsize(8)
    fig.tight_layout()
    return save_png(fig, Path(out), replace, what="graph plot")
