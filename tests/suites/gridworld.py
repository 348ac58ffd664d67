"""Gridworld-like logs written as goalkit logs, and their breadth-first-search answers.

The grid is a comb (a corridor y = 0, x = 0..W-1, with a tooth y = 1..H-1 at every x), a tree,
so the shortest path between two cells is unique. Each logged episode walks the shortest path
from a random start cell to a random end cell, one cell per step; actions are the (dx, dy)
moves. Breadth-first search over the cells (scipy.sparse.csgraph.shortest_path, unweighted)
gives the reference policy (the next cell on the shortest path) and value (negative distance).
Invented unit-test data.
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import shortest_path

W, H = 9, 5


def cells():
    """(x, y) of every cell of the comb, and the cell -> index map."""
    xy = [(x, 0) for x in range(W)] + [(x, y) for x in range(W) for y in range(1, H)]
    return np.array(xy, np.int64), {c: i for i, c in enumerate(xy)}


def graph():
    """Distance matrix and predecessors of the comb (breadth-first search)."""
    xy, index = cells()
    a, b = [], []
    for (x, y), i in index.items():
        if y == 0 and (x + 1, 0) in index:  # along the corridor
            a.append(i)
            b.append(index[(x + 1, 0)])
        if (x, y + 1) in index:  # up the tooth at x
            a.append(i)
            b.append(index[(x, y + 1)])
    n = len(xy)
    adj = coo_matrix((np.ones(len(a)), (a, b)), shape=(n, n)).tocsr()
    dist, pred = shortest_path(adj, directed=False, unweighted=True, return_predecessors=True)
    return xy, index, dist, pred


def episodes(n: int, seed: int):
    """``n`` logged shortest-path walks: list of (observations (T+1, 2), actions (T, 2))."""
    xy, index, dist, pred = graph()
    r = np.random.default_rng(seed)
    out = []
    while len(out) < n:
        s, g = r.integers(0, len(xy), 2)
        if dist[s, g] < 1 or not np.isfinite(dist[s, g]):
            continue
        path = [int(g)]
        while path[-1] != s:
            path.append(int(pred[s, path[-1]]))
        path = path[::-1]
        obs = xy[path].astype(np.float32)
        out.append((obs, np.diff(obs, axis=0).astype(np.float32)))
    return out


LAYOUT = """version = 1
shape = "grouped"
episode_groups = "runs/*"

[keys]
observation = "obs"
action = "act"
"""

RECIPE = """version = 1
seed = {seed}

[logs]
path = "grid-logs.h5"
layout = "grid-layout.toml"

[goal]
indices = [0, 1]
dtype = "float32"

[relabel]
goals_per_transition = 4
[relabel.weights]
future = 3
other_episode = 1

[reward]
distance = "euclidean"
threshold = 0.5

[split]
validation = 0.5

[output]
path = "{out}"
mode = "materialised"
"""


def write_logs(folder, n: int = 80, seed: int = 0) -> Path:
    """Write the logs, layout and a recipe into ``folder``; return the recipe path."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    with h5py.File(folder / "grid-logs.h5", "w") as f:
        for i, (obs, act) in enumerate(episodes(n, seed)):
            g = f.create_group(f"runs/ep{i:04d}")
            g["obs"] = obs
            g["act"] = act
    (folder / "grid-layout.toml").write_text(LAYOUT)
    return write_recipe(folder, "grid-goals.h5", seed=1)


def write_recipe(folder, out: str, seed: int = 1) -> Path:
    p = Path(folder) / f"recipe-{Path(out).stem}.toml"
    p.write_text(RECIPE.format(seed=seed, out=out))
    return p


class BFSPolicy:
    """Next move on the comb's shortest path from the state to the goal."""

    def __init__(self):
        self.xy, self.index, self.dist, self.pred = graph()

    def cell(self, v):
        return np.array([self.index[(int(round(a)), int(round(b)))] for a, b in v])

    def __call__(self, batch):
        s, g = self.cell(batch["observation"]), self.cell(batch["goal"])
        nxt = np.where(s == g, s, self.pred[g, s])  # predecessor of s on the path from g = next cell toward g
        return (self.xy[nxt] - self.xy[s]).astype(np.float64)

    def value(self, batch):
        s, g = self.cell(batch["observation"]), self.cell(batch["goal"])
        d = self.dist[s, g]
        return np.where(np.isfinite(d), -d, -1e6)


def write_checkpoints(folder) -> Path:
    """A module ``gridck`` with the BFS policy and value and random ones (names for entry points)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    here = Path(__file__).resolve().parent
    (folder / "gridck.py").write_text(f"""
import sys
sys.path.insert(0, {str(here)!r})
import numpy as np
from gridworld import BFSPolicy

_bfs = BFSPolicy()
MOVES = np.array([[1, 0], [-1, 0], [0, 1], [0, -1]], dtype=np.float64)

def bfs_policy(batch):
    return _bfs(batch)

def bfs_value(batch):
    return _bfs.value(batch)

def random_policy(batch):
    r = np.random.default_rng(int(np.abs(batch["goal"]).sum() * 1000) % 2**32)
    return MOVES[r.integers(0, 4, len(batch["goal"]))]

def random_value(batch):
    r = np.random.default_rng(int(np.abs(batch["observation"]).sum() * 1000) % 2**32)
    return r.normal(size=len(batch["goal"]))
""")
    return folder
