"""Several files and several sources in one build: [logs] path lists, globs, folders; [[sources]]."""

from __future__ import annotations

import hashlib
import json

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from goalkit import build, load_recipe, open_set, verify
from goalkit.archive import SOURCE_SHIFT, source_base
from goalkit.cli import main as cli_main

LAYOUT = 'version = 1\nshape = "flat"\n[keys]\nobservation = "obs"\naction = "act"\n[boundaries]\nepisode_id = "ids"\n'
TAIL = """
[goal]
indices = [0, 1]
[relabel]
goals_per_transition = 3
[relabel.weights]
future = 2
final = 1
geometric = 1
[reward]
threshold = 0.4
[split]
validation = 0.3
[output]
path = "{out}"
mode = "{mode}"
"""


def episodes(seed, n, width=3):
    r = np.random.default_rng(seed)
    lengths = r.integers(1, 9, n)
    return [(r.normal(size=(t + 1, width)), r.normal(size=(t, 2))) for t in lengths]


def write(path, eps, first_id=0):
    obs = np.concatenate([o for o, _ in eps])
    act = np.concatenate([a for _, a in eps])
    ids = np.repeat(np.arange(len(eps)) + first_id, [len(a) for _, a in eps])
    if str(path).endswith(".npz"):
        np.savez(path, obs=obs, act=act, ids=ids)
    else:
        with h5py.File(path, "w") as f:
            f["obs"], f["act"], f["ids"] = obs, act, ids


def recipe(d, name, logs_toml, mode="materialised"):
    (d / "layout.toml").write_text(LAYOUT)
    (d / f"{name}.toml").write_text("version = 1\nseed = 5\n" + logs_toml + TAIL.format(out=f"{name}.h5", mode=mode))
    return d / f"{name}.toml"


def columns(path, drop=()):
    with h5py.File(path, "r") as f:
        return {s: {k: f[s][k][:] for k in f[s] if k not in drop} for s in ("train", "validation")}


def digest(cols):
    h = hashlib.sha256()
    for s in sorted(cols):
        for k in sorted(cols[s]):
            h.update(k.encode())
            h.update(np.ascontiguousarray(cols[s][k]).tobytes())
    return h.hexdigest()


def test_a_list_of_files_builds_the_set_of_the_concatenated_log(tmp_path):
    eps = episodes(1, 14)
    write(tmp_path / "all.h5", eps)
    (tmp_path / "parts").mkdir()
    write(tmp_path / "parts" / "day2.npz", eps[:5])
    write(tmp_path / "parts" / "day10.h5", eps[5:9], first_id=77)      # its own ids: only changes count
    write(tmp_path / "parts" / "day11.npz", eps[9:])
    whole = build(load_recipe(recipe(tmp_path, "whole", '[logs]\npath = "all.h5"\nlayout = "layout.toml"\n')))
    listed = build(load_recipe(recipe(tmp_path, "listed", '[logs]\npath = ["parts/day11.npz", "parts/day2.npz", '
                                      '"parts/day10.h5"]\nlayout = "layout.toml"\n')))
    globbed = build(load_recipe(recipe(tmp_path, "globbed", '[logs]\npath = "parts/day*"\nlayout = "layout.toml"\n')))
    folder = build(load_recipe(recipe(tmp_path, "folder", '[logs]\npath = ["parts"]\nlayout = "layout.toml"\n')))
    ref = digest(columns(whole.path))
    for result in (listed, globbed, folder):
        assert digest(columns(result.path)) == ref
        assert verify(result.path).ok
    with h5py.File(folder.path, "r") as f:
        prov = json.loads(f.attrs["provenance"])
        summary = json.loads(f.attrs["summary"])
    # natural order of the full paths: day2 before day10 before day11
    assert [p.rsplit("/", 1)[1] for p in prov["sources"][0]["paths"]] == ["day2.npz", "day10.h5", "day11.npz"]
    assert summary["sources"]["logs"]["episodes"] == 14


def test_named_sources_keep_their_ids_when_a_source_is_added(tmp_path):
    write(tmp_path / "teleop-a.h5", episodes(2, 6))
    write(tmp_path / "teleop-b.npz", episodes(3, 4))
    write(tmp_path / "scripted.npz", episodes(4, 7))
    write(tmp_path / "policy.h5", episodes(5, 5))
    three = """
[[sources]]
name = "teleop"
path = "teleop-*"
layout = "layout.toml"
[[sources]]
name = "scripted"
path = "scripted.npz"
layout = "layout.toml"
"""
    fourth = '[[sources]]\nname = "policy-v3"\npath = ["policy.h5"]\nlayout = "layout.toml"\n'
    a = build(load_recipe(recipe(tmp_path, "two", three)))
    b = build(load_recipe(recipe(tmp_path, "three", fourth + three)))   # listed first: order does not matter
    ca, cb = columns(a.path), columns(b.path)
    for s in ("train", "validation"):
        # ids: the source's base (from its name alone) + position within the source
        ep = cb[s]["source_episode"]
        names = {"teleop": 0, "scripted": 1, "policy-v3": 0}
        codes = {"teleop": 1, "scripted": 2, "policy-v3": 0}       # position in the recipe
        for name in names:
            mine = (ep >> SOURCE_SHIFT) == (source_base(name) >> SOURCE_SHIFT)
            assert mine.any() and np.all(cb[s]["source"][mine] == codes[name])
        # the rows of the first two sources are unchanged by the third (split and every draw)
        keep = cb[s]["source"] != 0
        for k, v in ca[s].items():
            if k != "source":
                np.testing.assert_array_equal(v, cb[s][k][keep], err_msg=f"{s}/{k}")
        np.testing.assert_array_equal(ca[s]["source"], cb[s]["source"][keep] - 1)
    with h5py.File(b.path, "r") as f:
        summary = json.loads(f.attrs["summary"])
        prov = json.loads(f.attrs["provenance"])
    assert {n: v["episodes"] for n, v in summary["sources"].items()} == {"policy-v3": 5, "teleop": 10, "scripted": 7}
    assert sum(v["rows"]["train"] + v["rows"]["validation"] for v in summary["sources"].values()) == sum(
        summary["rows"].values())
    assert [(r["name"], r["code"], r["episodes"]) for r in prov["sources"]] == [
        ("policy-v3", 0, 5), ("teleop", 1, 10), ("scripted", 2, 7)]
    report = verify(b.path)
    assert report.ok, report.failures
    # tampering with the source column is caught by verify and by the audit
    with h5py.File(b.path, "r+") as f:
        col = f["train"]["source"]
        v = col[:]
        v[0] = (v[0] + 1) % 3
        col[...] = v
    report = verify(b.path)
    assert not report.ok
    assert any("source is not the episode's source" in m for m in report.failures)
    assert any("row rule 'source'" in m for m in report.failures)


def test_an_indexed_set_of_several_sources_reads_its_steps(tmp_path):
    write(tmp_path / "x.h5", episodes(6, 4))
    write(tmp_path / "y.npz", episodes(7, 3))
    logs = ('[[sources]]\nname = "x"\npath = "x.h5"\nlayout = "layout.toml"\n'
            '[[sources]]\nname = "y"\npath = "y.npz"\nlayout = "layout.toml"\n')
    mat = build(load_recipe(recipe(tmp_path, "mat", logs)))
    idx = build(load_recipe(recipe(tmp_path, "idx", logs, mode="indexed")))
    with open_set(idx.path) as gs, h5py.File(mat.path, "r") as f:
        n = gs.rows("train")
        rows = gs.read("train", ["observation", "action", "reached_goal", "source"], 0, n)
        for k in ("observation", "action", "reached_goal", "source"):
            np.testing.assert_array_equal(rows[k], f["train"][k][:])
    assert verify(idx.path).ok


def _cli_build(recipe_path):
    return CliRunner().invoke(cli_main, ["build", str(recipe_path)])


@pytest.mark.parametrize("case, logs, expected", [
    ("missing file", '[logs]\npath = ["a.h5", "gone.h5"]\nlayout = "layout.toml"\n',
     r"key logs.path: .*gone.h5: file not found"),
    ("glob matches nothing", '[logs]\npath = ["a.h5", "night-*.h5"]\nlayout = "layout.toml"\n',
     r"key logs.path: the pattern .*night-\*.h5 matches no file"),
    ("empty folder", '[logs]\npath = ["a.h5", "empty"]\nlayout = "layout.toml"\n',
     r"key logs.path: .*empty: the folder holds no .h5, .hdf5, .hdf, .npz files"),
    ("same name", '[[sources]]\nname = "t"\npath = "a.h5"\n[[sources]]\nname = "t"\npath = "b.npz"\n',
     r"key sources\[1\].name: two sources are named 't' \(sources\[0\] and sources\[1\]\)"),
    ("logs and sources", '[logs]\npath = "a.h5"\n[[sources]]\nname = "t"\npath = "b.npz"\n',
     r"key sources: expected either \[logs\] or \[\[sources\]\], not both"),
    ("layout disagrees", '[[sources]]\nname = "t"\npath = "a.h5"\nlayout = "layout.toml"\n'
                         '[[sources]]\nname = "u"\npath = "b.npz"\nlayout = "other.toml"\n',
     r"b.npz: key done: missing array; found: act, ids, obs \(source 'u'\)"),
    ("sources disagree", '[[sources]]\nname = "t"\npath = "a.h5"\nlayout = "layout.toml"\n'
                         '[[sources]]\nname = "u"\npath = "wide.npz"\nlayout = "layout.toml"\n',
     r"wide.npz: observation width is 5, but 3 in .*a.h5; expected every file of every source to agree "
     r"\(source 'u'\)"),
    ("bad name", '[[sources]]\nname = " t"\npath = "a.h5"\n', r"key sources\[0\].name: expected a source name"),
])
def test_bad_archives_are_one_line_with_exit_2_and_nothing_written(tmp_path, case, logs, expected):
    import os
    import re

    write(tmp_path / "a.h5", episodes(8, 3))
    write(tmp_path / "b.npz", episodes(9, 3))
    write(tmp_path / "wide.npz", episodes(10, 3, width=5))
    (tmp_path / "empty").mkdir()
    os.symlink(tmp_path / "a.h5", tmp_path / "link.h5")
    (tmp_path / "other.toml").write_text(LAYOUT.replace('episode_id = "ids"', 'done = "done"'))
    before = sorted(p.name for p in tmp_path.iterdir())
    res = _cli_build(recipe(tmp_path, "bad", logs))
    assert res.exit_code == 2, (case, res.output)
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in res.stderr, lines
    assert re.search(expected, lines[0]), (case, lines[0])
    after = sorted(p.name for p in tmp_path.iterdir())
    assert set(after) - set(before) <= {"layout.toml", "bad.toml"}      # nothing written


def test_a_file_named_twice_is_read_once(tmp_path):
    import os

    write(tmp_path / "a.h5", episodes(8, 3))
    os.symlink(tmp_path / "a.h5", tmp_path / "link.h5")
    twice = build(load_recipe(recipe(tmp_path, "twice", '[logs]\npath = ["a.h5", "link.h5", "*.h5"]\n'
                                     'layout = "layout.toml"\n')))
    once = build(load_recipe(recipe(tmp_path, "once", '[logs]\npath = "a.h5"\nlayout = "layout.toml"\n')))
    assert digest(columns(twice.path)) == digest(columns(once.path))


# ---- property: any split of an archive over files builds the set of the whole archive ---------------
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402


@st.composite
def archives(draw):
    n = draw(st.integers(1, 12))
    lengths = draw(st.lists(st.integers(1, 6), min_size=n, max_size=n))
    cuts = sorted(set(draw(st.lists(st.integers(1, max(n - 1, 1)), max_size=4)))) if n > 1 else []
    kinds = draw(st.lists(st.sampled_from(["h5", "npz"]), min_size=len(cuts) + 1, max_size=len(cuts) + 1))
    seed = draw(st.integers(0, 2 ** 16))
    shuffle = draw(st.permutations(range(len(cuts) + 1)))
    return lengths, cuts, kinds, seed, list(shuffle)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(archives())
def test_property_a_split_archive_builds_the_set_of_the_concatenated_archive(tmp_path_factory, archive):
    """For random archives cut into random file lists (HDF5 and NPZ, listed in any order), the set
    equals the set of the concatenated archive, byte for byte in every column (one unnamed source:
    there is no source column to differ)."""
    lengths, cuts, kinds, seed, order = archive
    d = tmp_path_factory.mktemp("prop")
    r = np.random.default_rng(seed)
    eps = [(r.normal(size=(t + 1, 3)), r.normal(size=(t, 2))) for t in lengths]
    write(d / "archive.h5", eps)
    bounds = [0] + cuts + [len(eps)]
    names = []
    for i, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
        name = f"part{i}.{kinds[i]}"                 # natural order of the names is the archive's order
        write(d / name, eps[a:b], first_id=int(r.integers(0, 100)))
        names.append(name)
    listed = ", ".join(f'"{names[i]}"' for i in order)
    whole = build(load_recipe(recipe(d, "whole", '[logs]\npath = "archive.h5"\nlayout = "layout.toml"\n')))
    parts = build(load_recipe(recipe(d, "parts", f'[logs]\npath = [{listed}]\nlayout = "layout.toml"\n')))
    assert digest(columns(parts.path)) == digest(columns(whole.path))


def test_build_prints_rows_per_source(tmp_path):
    write(tmp_path / "x.h5", episodes(11, 4))
    write(tmp_path / "y.npz", episodes(12, 2))
    path = recipe(tmp_path, "cli", '[[sources]]\nname = "teleop"\npath = "x.h5"\nlayout = "layout.toml"\n'
                                   '[[sources]]\nname = "scripted"\npath = "y.npz"\nlayout = "layout.toml"\n')
    res = _cli_build(path)
    assert res.exit_code == 0, res.output
    with h5py.File(tmp_path / "cli.h5", "r") as f:
        summary = json.loads(f.attrs["summary"])["sources"]
    for name in ("teleop", "scripted"):
        v = summary[name]
        row = (f"  {name:<15} {v['episodes']:>10,} {v['transitions']:>12,}   {v['goals_per_transition']:>10}   "
               f"{v['rows']['train']:,}/{v['rows']['validation']:,}")
        assert v["goals_per_transition"] == 3      # the [relabel] count: no source gives its own
        assert row in res.output
    assert summary["teleop"]["episodes"] == 4 and summary["scripted"]["episodes"] == 2


def test_an_output_over_a_listed_log_is_refused(tmp_path):
    write(tmp_path / "a.h5", episodes(13, 3))
    write(tmp_path / "b.h5", episodes(14, 3))
    path = recipe(tmp_path, "over", '[logs]\npath = ["a.h5", "*.h5"]\nlayout = "layout.toml"\n')
    res = CliRunner().invoke(cli_main, ["build", str(path), "--out", str(tmp_path / "b.h5")])
    assert res.exit_code == 2
    assert "refusing to write over an input" in res.stderr and "b.h5" in res.stderr
    assert h5py.is_hdf5(tmp_path / "b.h5")
    with h5py.File(tmp_path / "b.h5", "r") as f:
        assert set(f) == {"obs", "act", "ids"}                 # the log is untouched


def test_a_tuned_copy_in_another_folder_keeps_every_source_path(tmp_path):
    from goalkit.thresholds.recipe_edit import tuned_recipe_text

    write(tmp_path / "x.h5", episodes(15, 3))
    write(tmp_path / "y.npz", episodes(16, 3))
    text = recipe(tmp_path, "t", '[[sources]]\nname = "x"\npath = ["x.h5"]\nlayout = "layout.toml"\n'
                                 '[[sources]]\nname = "y"\npath = "y*.npz"\nlayout = "layout.toml"\n').read_text()
    (tmp_path / "sub").mkdir()
    edit = tuned_recipe_text(text, threshold=0.3, source_dir=tmp_path, target_dir=tmp_path / "sub")
    (tmp_path / "sub" / "t.toml").write_text(edit.text)
    moved = load_recipe(tmp_path / "sub" / "t.toml")
    assert [s.entries for s in moved.sources] == [(str(tmp_path / "x.h5"),), (str(tmp_path / "y*.npz"),)]
    assert [s.layout_path for s in moved.sources] == [str(tmp_path / "layout.toml")] * 2
