"""No command writes over one of its inputs: every output option pointed at every input in turn.

Each case points one output of one command at one input, directly, through a symbolic link or
through a hard link (for a folder input: a path inside the folder, or links to one of its
files), with and without ``--replace``. The command must stop before any work with exit 2 and
one line naming the output and the input, and every byte and every name in the folder must be
as before (so nothing is left at the output path, and no temporary file or build folder).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import pytest
from click.testing import CliRunner

from goalkit.cli import main
from safety_cases import copy_world, make_world, one_error_line, snapshot


@pytest.fixture(scope="session")
def world(tmp_path_factory) -> Path:
    """A template world (never run against directly; tests use copies)."""
    root = tmp_path_factory.mktemp("world")
    make_world(root)
    return root


@dataclass(frozen=True)
class Case:
    command: str          # for the test id
    option: str           # the output option under test
    inputs: tuple         # names (keys of make_world) the option is pointed at in turn
    folder_inputs: tuple = ()   # folder inputs: "inside", "symlink", "hardlink" to a file in it


def _argv(case_option: str, w: dict, out: Path, recipe_for_output=None) -> list:
    """The command line of an output option, writing to ``out``."""
    s = {k: str(v) for k, v in w.items()}
    return {
        "scan --write-layout": ["scan", s["logs"], "--layout", s["layout"], "--write-layout", str(out), "--quiet"],
        "scan(folder) --write-layout": ["scan", s["episodes"], "--layout", s["episodes-layout"],
                                        "--write-layout", str(out), "--quiet"],
        "scan --write-recipe": ["scan", s["logs"], "--layout", s["layout"], "--write-recipe", str(out), "--quiet"],
        "scan(folder) --write-recipe": ["scan", s["episodes"], "--layout", s["episodes-layout"],
                                        "--write-recipe", str(out), "--quiet"],
        "build --out": ["build", s["recipe"], "--out", str(out), "--quiet"],
        "build --out --workers 2": ["build", s["recipe"], "--out", str(out), "--workers", "2", "--quiet"],
        "build --out --scheduler": ["build", s["recipe"], "--out", str(out), "--scheduler", "tcp://127.0.0.1:9",
                                    "--quiet"],
        "build [output] path": ["build", str(recipe_for_output), "--quiet"],
        "build [output] path --workers 2": ["build", str(recipe_for_output), "--workers", "2", "--quiet"],
        "build(folder) --out": ["build", s["episodes-recipe"], "--out", str(out), "--quiet"],
        "embed -o": ["embed", s["logs"], "--layout", s["layout"], "--method", "precomputed", "--values",
                     s["values"], "-o", str(out), "--quiet"],
        "embed(folder) -o": ["embed", s["episodes"], "--layout", s["episodes-layout"], "--method", "raw",
                             "-o", str(out), "--quiet"],
        "tune --write-recipe": ["tune", s["recipe"], "--labels", s["labels"], "--resamples", "0",
                                "--write-recipe", str(out), "--quiet"],
        "tune --plots": ["tune", s["recipe"], "--labels", s["labels"], "--resamples", "0", "--plots", str(out),
                         "--quiet"],
    }[case_option]


RECIPE_INPUTS = ("recipe", "logs", "layout", "embedding", "library")
CASES = [
    Case("scan", "scan --write-layout", ("logs", "layout")),
    Case("scan", "scan(folder) --write-layout", ("episodes-layout",), ("episodes",)),
    Case("scan", "scan --write-recipe", ("logs", "layout")),
    Case("scan", "scan(folder) --write-recipe", ("episodes-layout",), ("episodes",)),
    Case("build", "build --out", RECIPE_INPUTS),
    Case("build", "build --out --workers 2", RECIPE_INPUTS),
    Case("build", "build --out --scheduler", RECIPE_INPUTS),
    Case("build", "build [output] path", RECIPE_INPUTS),
    Case("build", "build [output] path --workers 2", RECIPE_INPUTS),
    Case("build", "build(folder) --out", ("episodes-recipe", "episodes-layout"), ("episodes",)),
    Case("embed", "embed -o", ("logs", "layout", "values")),
    Case("embed", "embed(folder) -o", ("episodes-layout",), ("episodes",)),
    Case("tune", "tune --write-recipe", RECIPE_INPUTS + ("labels",)),
    Case("tune", "tune --plots", RECIPE_INPUTS + ("labels",)),
]
#: tune --plots names a folder; the input is reached through a plot file name in it (links only).
PLOT_NAME = "threshold-roc.png"


def _params():
    out = []
    for case in CASES:
        kinds = ("symlink", "hardlink") if case.option == "tune --plots" else ("direct", "symlink", "hardlink")
        for name in case.inputs:
            for kind in kinds:
                out.append((case.option, name, kind))
        for name in case.folder_inputs:
            for kind in ("inside", "symlink", "hardlink"):
                out.append((case.option, name, kind))
    return out


PARAMS = _params()


def _point(root: Path, w: dict, option: str, name: str, kind: str):
    """Make the output path for one case; return (out, argv, input path as the command names it)."""
    target = w[name]
    if name == "episodes" and kind != "inside":
        target = target / "ep1.npz"            # links to one file of the folder
    recipe_for_output = None
    if option == "tune --plots":
        plots = root / "plots"
        plots.mkdir()
        link = plots / PLOT_NAME
        os.symlink(target, link) if kind == "symlink" else os.link(target, link)
        out = plots
    elif kind == "direct":
        out = target
    elif kind == "inside":
        out = target / {"scan": "new.toml", "build": "new.h5", "embed": "new.npz"}[option.split("(")[0]]
    elif kind == "symlink":
        out = root / "out-link"
        os.symlink(target, out)
    else:
        out = root / "out-hard"
        os.link(target, out)
    if option.startswith("build [output] path"):
        # the recipe under test names the output; it is itself the "recipe" input
        recipe_for_output = root / "r-out.toml"
        if name == "recipe":
            if kind == "direct":
                out = recipe_for_output
            else:
                out.unlink()
                os.symlink(recipe_for_output, out) if kind == "symlink" else None
        text = w["recipe"].read_text()
        text = text.replace('path = "gantry-goals.h5"', f'path = "{out}"')
        recipe_for_output.write_text(text)
        if name == "recipe" and kind == "hardlink":
            os.link(recipe_for_output, out)
        named = recipe_for_output if name == "recipe" else w[name]
    else:
        named = w[name]
    return out, _argv(option, w, out, recipe_for_output), named


@pytest.mark.parametrize("replace", [False, True], ids=["plain", "replace"])
@pytest.mark.parametrize("option,name,kind", PARAMS, ids=[f"{o}|{n}|{k}" for o, n, k in PARAMS])
def test_output_pointed_at_an_input_is_refused_and_nothing_changes(world, tmp_path, option, name, kind, replace):
    root = copy_world(world, tmp_path / "w")
    w = {k: root / Path(v).relative_to(world) for k, v in _world_paths(world).items()}
    out, argv, named = _point(root, w, option, name, kind)
    before = snapshot(root)
    result = CliRunner().invoke(main, argv + (["--replace"] if replace else []))
    line = one_error_line(result)
    assert "refusing to write over an input" in line, line
    assert str(named) in line, (named, line)      # the line names the input ...
    assert str(out) in line or str(out / PLOT_NAME) in line, line   # ... and the output
    assert snapshot(root) == before               # every byte and every name as before


def _world_paths(world: Path) -> dict:
    return {"recipe": world / "full-recipe.toml", "logs": world / "gantry-logs.h5",
            "layout": world / "gantry-layout.toml", "embedding": world / "emb.npz", "library": world / "targets.npy",
            "labels": world / "labels.npz", "values": world / "values.npy", "episodes": world / "episodes",
            "episodes-layout": world / "episodes-layout.toml", "episodes-recipe": world / "episodes-recipe.toml"}


def test_case_count():
    # (command x output option x input x link kind); each runs plain and with --replace
    assert len(PARAMS) == 153   # 141 + scan --write-recipe: (logs, layout) x 3 kinds + (layout + folder) x 3
    assert len({(o, n, k) for o, n, k in PARAMS}) == len(PARAMS)


@pytest.mark.parametrize("option", sorted(c.option for c in CASES if c.option != "tune --plots"
                                           and "--workers" not in c.option and "--scheduler" not in c.option))
def test_the_same_commands_run_with_a_safe_output(world, tmp_path, option):
    """Control: each command line above works when its output is a fresh path, so the refusals
    are about the overlap and nothing else (sharded builds are exercised in tests/scale)."""
    root = copy_world(world, tmp_path / "w")
    w = {k: root / Path(v).relative_to(world) for k, v in _world_paths(world).items()}
    out = root / {"scan": "fresh.toml", "build": "fresh.h5", "embed": "fresh.npz", "tune": "fresh.toml"}[
        option.split(" ")[0].split("(")[0]]
    recipe_for_output = None
    if option.startswith("build [output] path"):
        recipe_for_output = root / "r-out.toml"
        recipe_for_output.write_text(w["recipe"].read_text().replace('path = "gantry-goals.h5"', f'path = "{out}"'))
    inputs = {k: v for k, v in snapshot(root).items()}
    result = CliRunner().invoke(main, _argv(option, w, out, recipe_for_output))
    assert result.exit_code == 0, result.output + result.stderr
    assert out.is_file()
    after = snapshot(root)
    assert {k: v for k, v in after.items() if k in inputs} == inputs   # inputs untouched
    new = {out.name} | ({f"{out.name}.card.md", f"{out.name}.card-goals.png"} if option.startswith("build") else set())
    assert set(after) - set(inputs) == new                             # only the output (and a set's card) is new
