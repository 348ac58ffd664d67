"""Fixtures: a gridworld set built with goalkit, a suite of it, and checkpoint modules."""

import pytest

import gridworld
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import load_recipe
from goalkit.suites.make import make_suite


@pytest.fixture(scope="session")
def grid(tmp_path_factory):
    folder = tmp_path_factory.mktemp("grid")
    recipe = gridworld.write_logs(folder, n=80, seed=0)
    build(load_recipe(recipe))
    other = gridworld.write_recipe(folder, "grid-goals-other.h5", seed=2)
    build(load_recipe(other))
    suite = make_suite(folder / "grid-goals.h5", folder / "grid-suite.h5", join_neighbours=64, per_cell=60, seed=0)
    gridworld.write_checkpoints(folder / "ck")
    return {"folder": folder, "set": folder / "grid-goals.h5", "other_set": folder / "grid-goals-other.h5",
            "suite": suite.path, "result": suite, "ck": folder / "ck"}
