"""Tables with documented defaults may be left out of a recipe; `goalkit scan RECIPE.toml` reports
on every source of a (multi-source) recipe."""

from __future__ import annotations

import json

import h5py
import numpy as np
from click.testing import CliRunner

import goalkit
from goalkit import info, load_recipe, open_set
from goalkit.cli import main as cli_main
from goalkit.relabel import Mixture

LAYOUT = 'version = 1\nshape = "flat"\n[keys]\nobservation = "obs"\naction = "act"\n[boundaries]\nepisode_id = "ids"\n'


def gk(*args):
    return CliRunner().invoke(cli_main, [str(a) for a in args])


def write_flat(path, lengths, seed=0, width=2):
    r = np.random.default_rng(seed)
    rows = sum(t + 1 for t in lengths)
    data = {"obs": r.normal(size=(rows, width)), "act": r.normal(size=(rows, 1)),
            "ids": np.repeat(np.arange(len(lengths)), [t + 1 for t in lengths])}
    if str(path).endswith(".npz"):
        np.savez(path, **data)
    else:
        with h5py.File(path, "w") as f:
            for k, v in data.items():
                f[k] = v


def test_a_minimal_recipe_builds_with_the_documented_defaults(tmp_path):
    """Only [logs], [goal], [reward] and [output]: [relabel] and [split] take docs/relabel.md's and
    docs/recipe.md's defaults (weights future = 1, 4 goals per transition; validation 0.1)."""
    write_flat(tmp_path / "a.h5", [4, 6, 3, 5, 7])
    (tmp_path / "layout.toml").write_text(LAYOUT)
    (tmp_path / "r.toml").write_text('[logs]\npath = "a.h5"\nlayout = "layout.toml"\n[goal]\nindices = [0, 1]\n'
                                     '[reward]\nthreshold = 0.5\n[output]\npath = "s.h5"\n')
    recipe = load_recipe(tmp_path / "r.toml")
    assert recipe.mixture == Mixture() and recipe.mixture.weights == {"future": 1.0}
    assert recipe.mixture.goals_per_transition == 4 and recipe.validation == 0.1 and recipe.seed == 0
    assert gk("build", tmp_path / "r.toml", "--quiet").exit_code == 0
    facts = info(tmp_path / "s.h5")
    assert sum(facts["rows"].values()) == 4 * (4 + 6 + 3 + 5 + 7)
    assert set(facts["strategies"]) == {"future"}
    assert gk("verify", tmp_path / "s.h5", "--quiet").exit_code == 0
    steps = open_set(tmp_path / "s.h5").read("train", columns=["steps_to_goal"])["steps_to_goal"]
    assert steps.min() >= 1      # future goals only: j in {t+1, ..., T}


def archive(tmp_path):
    (tmp_path / "teleop").mkdir()
    write_flat(tmp_path / "teleop" / "day1.h5", [3, 4], seed=1)
    write_flat(tmp_path / "teleop" / "day2.h5", [5], seed=2)
    write_flat(tmp_path / "scripted.npz", [2, 2, 6], seed=3)
    (tmp_path / "layout.toml").write_text(LAYOUT)
    body = ('[[sources]]\nname = "teleop"\npath = "teleop/"\nlayout = "layout.toml"\n'
            '[[sources]]\nname = "scripted"\npath = "scripted.npz"\n'
            '[goal]\nindices = [0, 1]\n[reward]\nthreshold = 0.5\n[output]\npath = "s.h5"\n')
    (tmp_path / "r.toml").write_text(body)
    return tmp_path / "r.toml"


def test_scan_of_a_recipe_reports_every_source(tmp_path):
    recipe = archive(tmp_path)
    res = gk("scan", recipe, "--json")
    assert res.exit_code == 0, res.stderr
    rep = json.loads(res.stdout)
    assert rep["ok"] and [s["name"] for s in rep["sources"]] == ["teleop", "scripted"]
    teleop, scripted = rep["sources"]
    assert [f.rsplit("/", 1)[-1] for f in teleop["files"]] == ["day1.h5", "day2.h5"]
    assert (teleop["episodes"], teleop["transitions"]) == (3, 12)
    assert (scripted["episodes"], scripted["transitions"]) == (3, 10)
    assert teleop["layout"]["from"] == "file" and scripted["layout"]["from"] == "detected"
    assert 'episode_id = "ids"' in scripted["layout"]["text"]
    assert {a["key"]: (a["shape"], a["dtype"]) for a in scripted["arrays"]["arrays"]} == {
        "act": ([13, 1], "float64"), "ids": ([13], "int64"), "obs": ([13, 2], "float64")}
    assert goalkit.scan(load_recipe(recipe)) == rep          # the Python API gives the same report
    text = gk("scan", recipe)
    assert text.exit_code == 0
    assert "source 'teleop' (sources[0].path): 2 file(s)" in text.stdout
    assert "episodes 3, transitions 10, length 2 .. 6; layout detected from the files" in text.stdout


def test_scan_of_a_recipe_with_a_bad_source_reports_all_then_exits_2(tmp_path):
    recipe = archive(tmp_path)
    np.savez(tmp_path / "scripted.npz", weird=np.zeros(3))          # nothing to detect
    res = gk("scan", recipe, "--json")
    assert res.exit_code == 2
    rep = json.loads(res.stdout)
    assert not rep["ok"] and rep["sources"][0]["problem"] is None and rep["sources"][0]["episodes"] == 3
    assert "could not find the actions" in rep["sources"][1]["problem"]
    assert rep["sources"][1]["arrays"]["arrays"] == [{"key": "weird", "shape": [3], "dtype": "float64"}]
    line = res.stderr.strip().splitlines()
    assert len(line) == 1 and "scripted.npz" in line[0] and "(source 'scripted')" in line[0]
    # a glob that matches nothing: one line naming the recipe, key and pattern; nothing on stdout
    recipe.write_text(recipe.read_text().replace('path = "scripted.npz"', 'path = "night-*.npz"'))
    res = gk("scan", recipe)
    assert res.exit_code == 2 and res.stdout == ""
    assert "key sources[1].path: the pattern" in res.stderr and "night-*.npz matches no file" in res.stderr
    # options that only make sense for logs are refused with a recipe
    res = gk("scan", recipe, "--write-recipe", tmp_path / "x.toml")
    assert res.exit_code == 2 and not (tmp_path / "x.toml").exists()


def test_a_layout_written_in_the_recipe(tmp_path):
    """`[logs.layout]` (and a source's `layout` table) instead of a layout file: the same set, and
    its errors name the recipe and the key under it."""
    write_flat(tmp_path / "a.h5", [4, 6, 3], seed=4)
    (tmp_path / "layout.toml").write_text(LAYOUT)
    tail = '[goal]\nindices = [0, 1]\n[reward]\nthreshold = 0.5\n[output]\npath = "{out}"\n'
    (tmp_path / "file.toml").write_text('[logs]\npath = "a.h5"\nlayout = "layout.toml"\n' + tail.format(out="f.h5"))
    inline = "[logs]\npath = \"a.h5\"\n[logs.layout]\n" + LAYOUT.replace("[keys]", "[logs.layout.keys]").replace(
        "[boundaries]", "[logs.layout.boundaries]") + tail.format(out="i.h5")
    (tmp_path / "inline.toml").write_text(inline)
    for name in ("file", "inline"):
        assert gk("build", tmp_path / f"{name}.toml", "--quiet").exit_code == 0
    a, b = open_set(tmp_path / "f.h5"), open_set(tmp_path / "i.h5")
    for split in ("train", "validation"):
        ca, cb = a.read(split), b.read(split)
        assert set(ca) == set(cb)
        for k in ca:
            np.testing.assert_array_equal(ca[k], cb[k], err_msg=k)
    assert gk("verify", tmp_path / "i.h5", "--quiet").exit_code == 0
    scan = json.loads(gk("scan", tmp_path / "inline.toml", "--json").stdout)
    assert scan["sources"][0]["layout"]["from"] == "recipe" and scan["sources"][0]["episodes"] == 3
    # a mistake in the table: one line naming the recipe and the key under [logs.layout]; nothing written
    (tmp_path / "bad.toml").write_text(inline.replace('action = "act"', 'action = "ac"').replace("i.h5", "bad.h5"))
    res = gk("build", tmp_path / "bad.toml")
    assert res.exit_code == 2 and not (tmp_path / "bad.h5").exists()
    assert "a.h5: key ac: missing array" in res.stderr
    (tmp_path / "bad.toml").write_text(inline.replace('shape = "flat"', 'shape = "flt"').replace("i.h5", "bad.h5"))
    res = gk("build", tmp_path / "bad.toml")
    assert res.exit_code == 2 and not (tmp_path / "bad.h5").exists()
    assert f"{tmp_path / 'bad.toml'}: key logs.layout.shape: expected one of" in res.stderr
    (tmp_path / "bad.toml").write_text(inline.replace('shape = "flat"\n', ''))
    res = gk("build", tmp_path / "bad.toml")
    assert res.exit_code == 2 and "key logs.layout: expected a layout file name or a layout table" in res.stderr


def test_a_source_layout_written_in_the_recipe(tmp_path):
    recipe = archive(tmp_path)
    text = recipe.read_text().replace('name = "scripted"\npath = "scripted.npz"\n',
                                      'name = "scripted"\npath = "scripted.npz"\n[sources.layout]\n'
                                      + LAYOUT.replace("[keys]", "[sources.layout.keys]")
                                      .replace("[boundaries]", "[sources.layout.boundaries]"))
    recipe.write_text(text)
    rep = json.loads(gk("scan", recipe, "--json").stdout)
    assert [s["layout"]["from"] for s in rep["sources"]] == ["file", "recipe"]
    assert gk("build", recipe, "--quiet").exit_code == 0
    assert gk("verify", tmp_path / "s.h5", "--quiet").exit_code == 0
    assert info(tmp_path / "s.h5")["transitions"] == 12 + 10
    recipe.write_text(text.replace('action = "act"', 'action = 5').replace('"s.h5"', '"t.h5"'))
    res = gk("build", recipe)
    assert res.exit_code == 2 and "key sources[1].layout.keys.action" in res.stderr
    assert not (tmp_path / "t.h5").exists()
