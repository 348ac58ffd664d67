"""A small world of inputs for the output-safety tests, and helpers to snapshot it.

``make_world(root)`` writes the invented irrigation-gantry demo (logs, layout, recipe), a goal
embedding, a goal library, labelled pairs, precomputed embedding values, a per-episode ``.npz``
folder with its layout, and recipes that read all of them. Every test copies the world and
checks that a refused command left every byte (and every name) in it as it was.
"""

from __future__ import annotations

import hashlib
import os
import shutil
from pathlib import Path

import numpy as np

from goalkit.demo import make_demo

#: Relabelling table of the full recipe: the goal library is an input too.
RELABEL = """[relabel]
goals_per_transition = 3
library = "targets.npy"
[relabel.weights]
future = 2
library = 1

"""

PERFILE_LAYOUT = """version = 1
shape = "per-file"
file_pattern = "*.npz"
[keys]
observation = "obs"
action = "act"
"""


def make_world(root: Path) -> dict:
    """Write every kind of input into ``root``; return name -> path (absolute)."""
    from goalkit.goals import Standardised, fit_on_logs
    from goalkit.logs import load_layout, open_logs

    root = Path(root)
    info = make_demo(root, episodes=12, seed=1)
    logs, layout, recipe = Path(info["logs"]), Path(info["layout"]), Path(info["recipe"])
    source = open_logs(logs, load_layout(layout))
    fit_on_logs(source, Standardised(), fields=["head", "trays"]).save(root / "emb.npz")
    states = int(source.lengths.sum() + len(source.lengths))
    np.save(root / "values.npy", np.linspace(0, 1, states * 2).reshape(states, 2))
    rng = np.random.default_rng(0)
    np.save(root / "targets.npy", rng.uniform(0, 1, size=(3, 6)))
    np.savez(root / "labels.npz", achieved=rng.normal(size=(40, 6)), goal=rng.normal(size=(40, 6)),
             reached=rng.random(40) < 0.5, episode=np.repeat(np.arange(8), 5))
    text = recipe.read_text()
    head, rest = text.split("[relabel]", 1)
    full = head + RELABEL + rest[rest.index("[reward]"):]
    full = full.replace('fields = ["head", "trays"]', 'embedding = "emb.npz"')
    (root / "full-recipe.toml").write_text(full)
    per = root / "episodes"
    per.mkdir()
    for i in range(3):
        obs = rng.normal(size=(6, 4)).astype(np.float32)
        np.savez(per / f"ep{i}.npz", obs=obs, act=rng.normal(size=(5, 2)).astype(np.float32))
    (root / "episodes-layout.toml").write_text(PERFILE_LAYOUT)
    per_recipe = text.replace('path = "gantry-logs.h5"', 'path = "episodes"')
    per_recipe = per_recipe.replace('layout = "gantry-layout.toml"', 'layout = "episodes-layout.toml"')
    per_recipe = per_recipe.replace('fields = ["head", "trays"]', "indices = [0, 1]")
    per_recipe = per_recipe.replace("original = 1", "original = 0")   # no task goals in these logs
    (root / "episodes-recipe.toml").write_text(per_recipe)
    return {"recipe": root / "full-recipe.toml", "logs": logs, "layout": layout, "embedding": root / "emb.npz",
            "library": root / "targets.npy", "labels": root / "labels.npz", "values": root / "values.npy",
            "episodes": per, "episodes-layout": root / "episodes-layout.toml",
            "episodes-recipe": root / "episodes-recipe.toml", "demo-recipe": recipe}


def copy_world(template: Path, target: Path) -> Path:
    """A private copy of the world (links copied as links)."""
    shutil.copytree(template, target, symlinks=True)
    return target


def snapshot(root: Path) -> dict:
    """Every entry under ``root``: relative name -> sha256 of a file, the target of a link, or "dir"."""
    out = {}
    for folder, dirs, files in os.walk(root):
        for name in dirs + files:
            p = Path(folder) / name
            rel = str(p.relative_to(root))
            if p.is_symlink():
                out[rel] = "link -> " + os.readlink(p)
            elif p.is_dir():
                out[rel] = "dir"
            else:
                out[rel] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def sha256(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def one_error_line(result) -> str:
    """The single stderr line of a refused CliRunner run (asserts exit 2, one line, no traceback)."""
    assert result.exit_code == 2, (result.exit_code, result.output, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("goalkit: error: "), lines[0]
    assert "Traceback" not in result.output and "Traceback" not in result.stderr
    assert result.stdout == ""
    return lines[0]
