"""`verify` on sets with goal heads or a [graph] table whose stored chunk does not decompress.

A damaged chunk is a finding, never a crash: exit status 1 with one failure naming the split,
column and rows, the place listed under ``checked.unreadable``, and the other checks still run.
The sets built so far covered plain sets only; goal heads and graph distances add columns of
their own, read by their own checks. Reference: the gzip stream format (RFC 1952) and HDF5's
chunk storage: a chunk whose bytes are all 0xFF is not a deflate stream, so the filter refuses it
(``h5py``'s ``write_direct_chunk`` stores bytes as given). Logs are the invented gantry demo.
"""

from __future__ import annotations

import json

import h5py
import pytest
from click.testing import CliRunner

from goalkit.cli import main
from goalkit.demo import make_demo
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import load_recipe
from test_head_build import HEADS   # the heads of the head build tests

GRAPH = """
[graph]
join_radius = 0.15
join_neighbours = 400
horizon = 60
goal_share = 1.0
index = "exact"
"""


def recipe_text(d, kind: str) -> str:
    text = (d / "gantry-recipe.toml").read_text()
    text = text.replace("gantry-goals.h5", f"{kind}-goals.h5").replace("chunk_rows = 65536", "chunk_rows = 1024")
    if kind == "heads":
        text = text.replace("goals_per_transition = 5", "goals_per_transition = 1")
        return text.replace('compression = "gzip"', 'compression = "gzip"\ngoals = "heads"') + HEADS
    return text + GRAPH


@pytest.fixture(scope="module", params=["heads", "graph"])
def built(request, tmp_path_factory):
    d = tmp_path_factory.mktemp(f"unreadable-{request.param}")
    make_demo(d, episodes=40, seed=9)
    path = d / f"{request.param}-recipe.toml"
    path.write_text(recipe_text(d, request.param))
    result = build(load_recipe(path), card=False)
    return request.param, result.path


def damage_one_chunk(path, name: str) -> int:
    """Overwrite the bytes of the second stored chunk of dataset ``name``; its first row."""
    with h5py.File(path, "r+") as f:
        ds = f[name]
        assert ds.compression == "gzip" and ds.shape[0] > ds.chunks[0]
        mask, data = ds.id.read_direct_chunk((ds.chunks[0],) + (0,) * (ds.ndim - 1))
        ds.id.write_direct_chunk((ds.chunks[0],) + (0,) * (ds.ndim - 1), b"\xff" * len(data), mask)
        return ds.chunks[0], min(2 * ds.chunks[0], ds.shape[0])


def column_of(path, kind: str) -> str:
    """A column only sets of this kind have (read from the file, not assumed)."""
    with h5py.File(path, "r") as f:
        names = sorted(f["train"].keys())
    # a head's columns are NAME@HEAD (docs/dataset.md); a graph set's distance column names the graph
    wanted = [n for n in names if ("@" in n and n.startswith("goal") if kind == "heads" else "graph" in n)]
    assert wanted, names
    return wanted[0]


def test_the_undamaged_set_verifies(built):
    _, path = built
    res = CliRunner().invoke(main, ["verify", str(path), "--json", "--quiet"])
    assert res.exit_code == 0, res.output[-2000:]
    assert json.loads(res.stdout)["ok"]


def test_a_damaged_chunk_of_its_own_column_is_a_finding_with_the_place(built, tmp_path):
    kind, good = built
    bad = tmp_path / f"bad-{kind}.h5"
    bad.write_bytes(good.read_bytes())
    column = column_of(good, kind)
    first, stop = damage_one_chunk(bad, f"train/{column}")
    res = CliRunner().invoke(main, ["verify", str(bad), "--json"])
    assert res.exit_code == 1, res.output[-3000:]
    assert "Traceback" not in res.output
    report = json.loads(res.stdout)
    assert {"split": "train", "column": column, "rows": [first, stop]} in report["checked"]["unreadable"]
    assert any(f"train/{column} rows {first} .. {stop - 1} cannot be read" in m for m in report["failures"])
    assert report["checked"]["rows"]["train"] > 0      # the other rows were still checked
    # the quiet form is one line on stderr
    res = CliRunner().invoke(main, ["verify", str(bad), "--quiet"])
    assert res.exit_code == 1 and res.stdout == ""
    assert res.stderr.strip().count("\n") == 0 and res.stderr.startswith(f"goalkit: NOT consistent: {bad} (")
